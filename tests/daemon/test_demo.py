"""`lotwarden demo`: runs the real daemon on the sample exports and tells the story, exit 0, no network."""

from __future__ import annotations

import email
import email.policy
import json
import sqlite3
import subprocess
import sys
from pathlib import Path


def test_demo_exits_0_and_prints_the_story(tmp_path):
    """The demo takes every sample file, closes the lots, prints alerts, e-mails and a verdict table."""
    work = tmp_path / "demo"
    res = subprocess.run([sys.executable, "-m", "monitor", "demo", "--workdir", str(work)], cwd=tmp_path,
                         check=False, capture_output=True, text=True, timeout=120)
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
    assert sorted(kept) == sorted([*samples, f"resent-{samples[0]}"])
    # every alert in the log is a JSON object with a kind
    for raw in (work / "state" / "alerts.jsonl").read_text().splitlines():
        assert json.loads(raw)["kind"]
    # reasons are printed in full: each verdict row of the table ends with the whole reason stored for it
    conn = sqlite3.connect(work / "state" / "lotwarden.db")
    try:
        stored = [(lot, json.loads(payload)["reason"]) for lot, payload in
                  conn.execute("SELECT lot, payload FROM verdicts")]
    finally:
        conn.close()
    assert any(len(reason) > 100 for _, reason in stored)          # the drifting-head reason is a long one
    rows = [ln for ln in out.splitlines() if "Lots and verdicts" not in ln]
    for lot, reason in stored:
        assert any(f" {lot} " in ln and ln.endswith(reason) for ln in rows), (lot, reason)
    # the e-mails received are saved in the work folder: .eml, the HTML part, the chart PNGs
    mails = work / "e-mails"
    assert f"e-mails received are saved in {mails}" in out
    emls = sorted(mails.glob("*.eml"))
    assert emls and len(emls) == out.count("  e-mail #")
    for eml in emls:
        msg = email.message_from_bytes(eml.read_bytes(), policy=email.policy.default)
        assert f"Subject: {msg['Subject']}" in out                  # the message the demo printed
        assert "competent authority" in msg.get_body(("plain",)).get_content()
        html = eml.with_suffix(".html")
        assert html.is_file()
        page = html.read_text(encoding="utf-8")
        assert "<html" in page and "competent authority" in page
        pngs = sorted(mails.glob(f"{eml.stem}-chart-*.png"))
        assert len(pngs) == sum(1 for p in msg.walk() if p.get_content_type() == "image/png")
        for png in pngs:
            assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"      # PNG signature (PNG spec, section 5.2)
            assert f'src="{png.name}"' in page                       # the saved page shows the saved chart
        assert f"saved: {eml.name}" in out
    assert any(mails.glob("*.png"))                                 # the demo's holds carry charts
