"""Fixtures of the record commands' tests: one real daemon run per test module, its state then read."""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path

import pytest
from record_run import RecordRun, run_plant


@pytest.fixture(scope="module")
def record_run(tmp_path_factory: pytest.TempPathFactory) -> Iterator[RecordRun]:
    """The plant after a real `lotwarden run` judged its lots and was stopped (module-wide: treat as read-only;
    a test that writes (dispose) makes its own with ``run_plant``)."""
    run, _ = run_plant(tmp_path_factory.mktemp("record"))
    yield run


@pytest.fixture
def fresh_run(tmp_path: Path) -> RecordRun:
    """A plant of its own for a test that changes the state."""
    run, _ = run_plant(tmp_path)
    return run
