"""Helpers to run the real `lotwarden` command as a subprocess."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path
from typing import Any

import pytest

REPO = Path(__file__).resolve().parents[2]


class Result:
    def __init__(self, proc: subprocess.CompletedProcess[str]) -> None:
        self.code = proc.returncode
        self.out = proc.stdout
        self.err = proc.stderr

    def json(self) -> Any:
        return json.loads(self.out)


def lotwarden(*args: str, cwd: Path | None = None) -> Result:
    proc = subprocess.run([sys.executable, "-m", "monitor", *args], cwd=cwd or REPO, capture_output=True,
                          text=True, timeout=120, check=False)
    return Result(proc)


@pytest.fixture
def cli():
    return lotwarden
