"""Project-wide test fixtures."""

from pathlib import Path

import pytest
from hypothesis import settings

# Fixed seeds for property tests too: hypothesis draws the same examples on every run.
settings.register_profile("lotwarden", derandomize=True, deadline=None)
settings.load_profile("lotwarden")

REPO = Path(__file__).resolve().parent.parent


@pytest.fixture
def repo_root() -> Path:
    return REPO
