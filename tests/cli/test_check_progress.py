"""`check` shows progress (files read, lots judged) on stderr when it is a terminal, and never otherwise."""

from __future__ import annotations

import os
import select
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

from .conftest import REPO, lotwarden


def _exports(folder: Path, files: int = 3, lots: int = 40) -> list[str]:
    rng = np.random.default_rng(17)
    paths = []
    for f in range(files):
        p = folder / f"L1-{f}.csv"
        rows = [f"B{f}-{k},{v:.1f}" for k in range(lots) for v in rng.normal(500.0, 2.0, 20)]
        p.write_text("lot,value\n" + "\n".join(rows) + "\n")
        paths.append(str(p))
    return paths


def _run_with_terminal_stderr(args: list[str], out_file: Path) -> tuple[int, str, bytes]:
    """Run lotwarden with stderr on a pseudo-terminal (a real tty for the child), stdout to a file (a
    pipe nobody reads while the pty is drained could fill and block the child)."""
    master, slave = os.openpty()
    chunks: list[bytes] = []
    deadline = time.monotonic() + 120
    try:
        with out_file.open("wb") as out:
            proc = subprocess.Popen([sys.executable, "-m", "monitor", *args], cwd=REPO, stdout=out,
                                    stderr=slave, stdin=subprocess.DEVNULL)
        os.close(slave)
        slave = -1
        try:
            while time.monotonic() < deadline:
                ready, _, _ = select.select([master], [], [], 1.0)
                if not ready:
                    if proc.poll() is not None:
                        break
                    continue
                try:
                    data = os.read(master, 65536)
                except OSError:      # EIO: the child closed its end
                    break
                if not data:
                    break
                chunks.append(data)
            code = proc.wait(timeout=max(1.0, deadline - time.monotonic()))
        finally:
            if proc.poll() is None:
                proc.kill()
                proc.wait()
    finally:
        if slave >= 0:
            os.close(slave)
        os.close(master)
    return code, out_file.read_text(), b"".join(chunks)


def test_progress_on_a_terminal(tmp_path: Path) -> None:
    """With stderr a terminal, the status line counts files read and lots judged; stdout is the JSON alone."""
    paths = _exports(tmp_path)
    code, out, err = _run_with_terminal_stderr(["check", *paths, "--target", "500", "--format", "json"],
                                               tmp_path / "out.json")
    assert code in (0, 1), err
    text = err.decode()
    assert "3/3 files read" in text
    assert "120/120 lots judged" in text                 # 3 files x 40 lots (hand count)
    assert "\r" in text                                  # a line that rewrites itself
    assert "files read" not in out
    piped = lotwarden("check", *paths, "--target", "500", "--format", "json")
    assert piped.out == out                              # the same output either way


def test_no_progress_when_stderr_is_not_a_terminal(tmp_path: Path) -> None:
    """With stderr a pipe there is no status line: nothing at all on stderr for clean files."""
    paths = _exports(tmp_path)
    r = lotwarden("check", *paths, "--target", "500", "--format", "json")
    assert r.code in (0, 1), r.err
    assert r.err == ""
    assert len(r.json()) == 120
