"""Rows the reader leaves out and its notes reach the audit trail and the log line; nothing is silent."""

from __future__ import annotations

import json


def test_bad_rows_and_notes_are_audited(intake_env) -> None:
    """A file with one unreadable value and unreadable timestamps is taken; the audit names line and reason."""
    cfg, store, intake, drop = intake_env
    rows = ["lot,product,value,timestamp"] + [f"A1,OAT-500,{500 + i / 10},yesterday" for i in range(30)]
    rows[5] = "A1,OAT-500,abc,yesterday"           # line 6: not a number
    p = drop / "L1-notes.csv"
    p.write_text("\n".join(rows) + "\n", encoding="utf-8")
    out = intake.process(p)
    assert out.status == "taken" and out.n_values == 29
    assert "1 bad row(s) left out, first line 6" in out.describe()
    assert "timestamp" in out.describe()
    detail = json.loads(store.conn.execute("SELECT detail FROM audit WHERE event='file-taken'").fetchone()[0])
    assert detail["bad_rows"] == 1
    assert detail["bad_row_details"][0]["line"] == 6 and detail["bad_row_details"][0]["column"] == "value"
    assert any("timestamp_format" in n for n in detail["notes"])
