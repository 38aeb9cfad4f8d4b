"""Fixtures for the daemon core tests: a real config file, rule files and folders under tmp_path."""

from __future__ import annotations

import textwrap
from pathlib import Path

import pytest

from plant import OAT_RULE

JUICE_RULE = """\
name = "juice-1l"
products = ["JUICE-1L"]
target = 1000.0
unit = "mL"
alternative = "less"
alpha = 0.01
min_n = 5
idle_minutes = 10
"""


def write_setup(root: Path, extra: str = "", rules: dict[str, str] | None = None) -> Path:
    """Write config/lotwarden.toml, rules/ and the folders it names under ``root``; return the config path."""
    (root / "drop").mkdir(parents=True, exist_ok=True)
    rules_dir = root / "rules"
    rules_dir.mkdir(parents=True, exist_ok=True)
    for name, text in (rules if rules is not None else {"oat-500.toml": OAT_RULE,
                                                         "juice-1l.toml": JUICE_RULE}).items():
        (rules_dir / name).write_text(text, encoding="utf-8")
    cfg_dir = root / "config"
    cfg_dir.mkdir(parents=True, exist_ok=True)
    cfg = cfg_dir / "lotwarden.toml"
    cfg.write_text(textwrap.dedent(f"""\
        rules_dir = "../rules"

        [watch]
        folder = "../drop"
        settle_seconds = 0

        [state]
        folder = "../state"

        [alerts.log]
        path = "../state/alerts.jsonl"
        """) + textwrap.dedent(extra), encoding="utf-8")
    return cfg


@pytest.fixture
def setup_dir(tmp_path: Path) -> Path:
    """A folder with config/lotwarden.toml, rules/ (OAT-500, JUICE-1L) and drop/."""
    write_setup(tmp_path)
    return tmp_path


@pytest.fixture
def make_setup():
    """The ``write_setup(root, extra="", rules=None) -> config path`` helper, as a fixture."""
    return write_setup


class StepClock:
    """A settable UTC clock for the intake (a value source, not a stand-in for any I/O part)."""

    def __init__(self, start: str = "2026-11-30T06:00:00+00:00") -> None:
        from datetime import datetime

        self.now = datetime.fromisoformat(start)

    def __call__(self):
        return self.now

    def advance(self, seconds: float) -> None:
        from datetime import timedelta

        self.now = self.now + timedelta(seconds=seconds)


def engine_works() -> bool:
    """True once monitor.engine.evaluate is implemented (tests comparing its numbers skip before)."""
    import numpy as np

    from monitor.engine import evaluate
    from monitor.lot import LotData, LotKey
    from monitor.rulebook import Rule

    try:
        evaluate(LotData(key=LotKey("", "", ""), values=np.array([1.0, 2.0, 3.0, 4.0, 5.0])),
                 Rule.adhoc(target=3.0, unit="g"))
    except NotImplementedError:
        return False
    return True


@pytest.fixture
def clock() -> StepClock:
    return StepClock()


@pytest.fixture
def intake_env(tmp_path: Path, clock: StepClock):
    """(config, store, intake, drop folder) on real files; the store is closed after the test."""
    from monitor.daemon.config import load_config, load_rule_set
    from monitor.daemon.intake import Intake
    from monitor.state.database import Database as Store

    cfg = load_config(write_setup(tmp_path, extra="""
        [profiles.l3-juice-gross]
        match = ["L3-juice-*.csv"]
        unit = "g"
        density = 1.045

        [profiles.l4-markers]
        match = ["L4-*.csv"]
        end_of_lot = "END"
        """))
    store = Store.open(cfg.state.folder)
    intake = Intake(cfg, load_rule_set(cfg), store, clock=clock)
    try:
        yield cfg, store, intake, cfg.watch.folder
    finally:
        store.close()


@pytest.fixture(scope="session")
def engine_ready() -> bool:
    """The engine is implemented: a regression to a stub fails here instead of skipping the scipy checks."""
    assert engine_works(), "monitor.engine.evaluate is not implemented"
    return True
