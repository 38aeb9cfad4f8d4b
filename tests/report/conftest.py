"""Fixtures of the report tests."""

from __future__ import annotations

import pytest

from monitor.report.model import Report

from .brackenfield_scenario import make_report


@pytest.fixture
def brackenfield_report() -> Report:
    return make_report()
