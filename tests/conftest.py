"""Project-wide test fixtures."""

from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parent.parent
SHARED = REPO.parent / "shared"


@pytest.fixture
def repo_root() -> Path:
    return REPO
