"""The run loop end to end: a dropped export becomes a stored verdict, a hold alert in the log, an archived file."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
from scipy import stats

from test_service import HEADER, Running, count, csv_rows, make_plant, query, wait_for, write_atomically  # noqa: F401
from test_service import _no_leaked_threads  # noqa: F401  (autouse fixture: no threads left running)


def test_file_to_verdict_hold_alert_and_archive(tmp_path):
    """A finished export is taken once; its closed lot is judged and a hold alert reaches the log."""
    cfg = make_plant(tmp_path)
    db = tmp_path / "state" / "lotwarden.db"
    rng = np.random.default_rng(20261201)
    low = np.round(rng.normal(497.0, 1.0, 12), 1)        # lot A1: clearly under the 500 g target
    ok = np.round(rng.normal(500.0, 1.0, 6), 1)
    with Running(cfg) as r:
        write_atomically(tmp_path / "drop" / "L1-0600.csv",
                         HEADER + csv_rows("L1", "A1", low) + csv_rows("L1", "A2", ok, start=20))
        assert wait_for(lambda: db.exists() and count(db, "SELECT count(*) FROM verdicts") >= 1)
        assert wait_for(lambda: (tmp_path / "alerts.jsonl").exists()
                        and '"hold"' in (tmp_path / "alerts.jsonl").read_text())
        assert not (tmp_path / "drop" / "L1-0600.csv").exists()
    files = query(db, "SELECT state, archived_path FROM files")
    assert [f[0] for f in files] == ["done"]
    arch = Path(files[0][1])
    assert arch.exists() and arch.parent.parent.name == "archive"
    assert len(arch.parent.name) == 10 and arch.parent.name[4] == "-"   # archive/YYYY-MM-DD/
    verdict, payload = query(db, "SELECT verdict, payload FROM verdicts WHERE lot = 'A1'")[0]
    assert verdict == "hold"
    # reference: scipy.stats.ttest_1samp on the same 12 values against 500 (independent library)
    ref = stats.ttest_1samp(low, 500.0)
    assert json.loads(payload)["p_value"] == pytest.approx(ref.pvalue, rel=1e-9)
    hold = [json.loads(x) for x in (tmp_path / "alerts.jsonl").read_text().splitlines()
            if json.loads(x)["kind"] == "hold"]
    assert len(hold) == 1 and hold[0]["lot"] == "A1"
    assert hold[0]["data"]["values"] == pytest.approx(list(low))      # arrival order, for the chart


