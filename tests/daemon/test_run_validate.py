"""`lotwarden validate`: prints what it checked and exits 0; a bad config or rule exits 2 naming file and key."""

from __future__ import annotations

import subprocess
import sys
import textwrap
from pathlib import Path

import pytest

from monitor.cli import main

RULE = textwrap.dedent("""\
    name = "oat-500"
    products = ["OAT-500"]
    target = 500.0
    unit = "g"
    alpha = 0.05
    """)


def make_setup(root: Path, config_extra: str = "", rule: str = RULE) -> Path:
    (root / "rules").mkdir(parents=True, exist_ok=True)
    (root / "rules" / "oat-500.toml").write_text(rule, encoding="utf-8")
    cfg = root / "lotwarden.toml"
    cfg.write_text(textwrap.dedent("""\
        rules_dir = "rules"

        [watch]
        folder = "drop"
        settle_seconds = 1

        [state]
        folder = "state"

        [alerts.log]
        path = "state/alerts.jsonl"
        """) + textwrap.dedent(config_extra), encoding="utf-8")
    return cfg


def test_good_config_exits_0_and_lists_what_it_checked(tmp_path, capsys):
    """A good config: exit 0, with rule count, profile count and channels printed."""
    cfg = make_setup(tmp_path)
    assert main(["validate", "--config", str(cfg)]) == 0
    out = capsys.readouterr().out
    assert "rules: 1" in out and "oat-500" in out
    assert "profiles: 0" in out
    assert "alert channels: log" in out


@pytest.mark.parametrize("extra, rule, where", [
    ("[watch.extra]\nx = 1\n", RULE, "watch.extra"),                              # unknown key
    ("bogus = 1\n", RULE, "bogus"),                                               # unknown top-level key
    ("", RULE.replace("alpha = 0.05", "alpha = 1.5"), "alpha"),                  # alpha out of (0, 0.5]
    ("", RULE + "target = \n", "oat-500.toml"),                                  # TOML syntax error
])
def test_bad_config_or_rule_exits_2_naming_file_and_key(tmp_path, capsys, extra, rule, where):
    """Bad TOML, an unknown key or alpha out of range: exit 2 and one line naming the file and key."""
    cfg = make_setup(tmp_path, extra, rule)
    assert main(["validate", "--config", str(cfg)]) == 2
    err = capsys.readouterr().err
    assert err.startswith("lotwarden: ")
    assert where in err
    assert len(err.strip().splitlines()) == 1


def test_missing_config_file_exits_2(tmp_path, capsys):
    """A config path that does not exist is a clear exit-2 error, not a traceback."""
    assert main(["validate", "--config", str(tmp_path / "nope.toml")]) == 2
    assert "nope.toml" in capsys.readouterr().err


def test_validate_as_a_subprocess(tmp_path):
    """The installed command behaves the same from a shell: exit codes 0 and 2."""
    cfg = make_setup(tmp_path)
    ok = subprocess.run([sys.executable, "-m", "monitor", "validate", "--config", str(cfg)],
                        capture_output=True, text=True, timeout=60)
    assert ok.returncode == 0, ok.stderr
    (tmp_path / "rules" / "oat-500.toml").write_text(RULE + "colour = 'red'\n")
    bad = subprocess.run([sys.executable, "-m", "monitor", "validate", "--config", str(cfg)],
                         capture_output=True, text=True, timeout=60)
    assert bad.returncode == 2
    assert "oat-500.toml" in bad.stderr and "colour" in bad.stderr
    assert "Traceback" not in bad.stderr


def test_operator_templates_are_checked(tmp_path, capsys):
    """An operator template folder is loaded and checked; a syntax error exits 2 naming the file."""
    cfg = make_setup(tmp_path)
    cfg.write_text(cfg.read_text().replace("[alerts.log]", '[alerts]\ntemplates = "tpl"\n\n[alerts.log]', 1))
    tpl = tmp_path / "tpl"
    tpl.mkdir()
    (tpl / "hold.subject.txt").write_text("HOLD {{ alert.lot }}\n")
    assert main(["validate", "--config", str(cfg)]) == 0, capsys.readouterr().err
    assert "operator templates" in capsys.readouterr().out
    (tpl / "hold.subject.txt").write_text("HOLD {{ alert.lot \n")
    assert main(["validate", "--config", str(cfg)]) == 2
    assert "hold.subject.txt" in capsys.readouterr().err
