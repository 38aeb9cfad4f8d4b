"""The README documents every key and its examples are valid; CI runs the README's test command."""

from __future__ import annotations

import re
import tomllib
from pathlib import Path

from monitor.alerts.settings import parse_alerts
from monitor.keysdoc import BEGIN, END, render
from monitor.rulebook import Rule

REPO = Path(__file__).resolve().parent.parent
README = (REPO / "README.md").read_text(encoding="utf-8")


def test_readme_key_reference_is_current() -> None:
    """The keys section equals the rendering of the key declarations in monitor.keys (refresh: python -m
    monitor.keysdoc), so a key added without regenerating the reference fails here."""
    section = README.split(BEGIN, 1)[1].split(END, 1)[0]
    assert section.strip() == render().strip()


def test_readme_rule_example_is_a_valid_rule() -> None:
    """The rule-file example in README loads without error."""
    block = re.search(r"```toml\n(name = .*?)```", README, re.S)
    assert block is not None
    rule = Rule.from_toml(tomllib.loads(block.group(1)), source="README.md")
    assert rule.name and rule.normality.on_fail in ("review", "wilcoxon", "ignore")


def test_readme_email_example_is_valid() -> None:
    """The e-mail example in README passes the alert settings' validation."""
    block = re.search(r"```toml\n(\[alerts\.email\].*?)```", README, re.S)
    assert block is not None
    settings = parse_alerts(tomllib.loads(block.group(1))["alerts"], source="README.md", base_dir=REPO)
    assert "email" in settings.channels


def test_ci_runs_the_readme_test_command() -> None:
    """.ci/run ends with the same test command the README gives."""
    ci = (REPO / ".ci" / "run").read_text()
    test_cmd = re.search(r"\*\*Run the tests:\*\*\s*```\s*(.+?)\s*```", README, re.S).group(1)
    for part in test_cmd.split("&&"):
        assert part.strip() in ci
    shipped = [p.name for p in (REPO / "rules").glob("*.toml")]
    assert shipped, "rules/ ships the demo rules"
