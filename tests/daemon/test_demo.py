"""`lotwarden demo`: runs the real daemon on the sample exports and tells the story, exit 0, no network."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path


def test_demo_exits_0_and_prints_the_story(tmp_path):
    """The demo takes every sample file, closes the lots, prints alerts, e-mails and a verdict table."""
    work = tmp_path / "demo"
    res = subprocess.run([sys.executable, "-m", "monitor", "demo", "--workdir", str(work)], cwd=tmp_path,
                         capture_output=True, text=True, timeout=120)
    out = res.stdout
    assert res.returncode == 0, out + res.stderr
    repo = Path(__file__).resolve().parents[2]
    samples = sorted(p.name for p in (repo / "sample_feeds").iterdir() if p.is_file())
    for name in samples:                                    # every sample file taken, in the story
        assert f"file finished, taken: {name}" in out
    assert "duplicate resent-" in out                       # the re-sent file is reported, not counted
    assert "alert logged: file-duplicate" in out
    assert "end of shift: closing every open lot" in out
    assert "Lots and verdicts" in out
    assert "competent authority" in out                     # the screening disclaimer under the table
    assert "alert logged: hold" in out
    assert "e-mail #1" in out and "Subject:" in out
    # the drop folder is empty: every file went to the archive or the quarantine (nothing deleted)
    assert not list((work / "drop").iterdir())
    kept = [p.name for p in (work / "state").rglob("*") if p.is_file() and p.parent.parent.name in
            ("archive", "quarantine") and not p.name.endswith(".reason.txt")]
    assert sorted(kept) == sorted(samples + [f"resent-{samples[0]}"])
    # every alert in the log is a JSON object with a kind
    for raw in (work / "state" / "alerts.jsonl").read_text().splitlines():
        assert json.loads(raw)["kind"]
