"""A deleted rule stays in force through unrelated edits until SIGHUP; a repeated bad edit alerts again."""

from __future__ import annotations

from pathlib import Path

from monitor.polling import wait_until as wait_for
from plant import HEADER, csv_rows, make_plant
from test_service import Running, count, query, write_atomically

JAM_RULE = 'name = "jam-340"\nproducts = ["JAM-340"]\ntarget = 342.0\nunit = "g"\nmin_n = 5\n'


def test_deleted_rule_survives_an_unrelated_edit_until_sighup(tmp_path: Path) -> None:
    """Delete oat-500 (one config-rejected alert), then edit another rule file: oat-500 still judges the
    next OAT-500 lot (no "no rule matches"); only a forced reload (SIGHUP's path) drops it."""
    cfg = make_plant(tmp_path, idle_minutes=600)
    rules = tmp_path / "rules"
    (rules / "jam-340.toml").write_text(JAM_RULE, encoding="utf-8")
    db = tmp_path / "state" / "lotwarden.db"
    rejected = "SELECT count(*) FROM alerts WHERE kind = 'config-rejected'"
    with Running(cfg, reload_check_seconds=0.2) as r:
        (rules / "oat-500.toml").unlink()
        assert wait_for(lambda: count(db, rejected) == 1), r.log.getvalue()
        write_atomically(rules / "jam-340.toml", "# a comment added by the operator\n" + JAM_RULE)
        assert wait_for(lambda: "reloaded:" in r.log.getvalue() and "jam-340" in r.log.getvalue()), \
            r.log.getvalue()
        assert wait_for(lambda: sorted(x.name for x in r.daemon.components.rules) == ["jam-340", "oat-500"], 5)
        (tmp_path / "drop" / "a.csv").write_text(HEADER + csv_rows("L1", "A1", [500.1, 499.8, 500.3, 500.0, 499.9,
                                                                                 500.2])
                                                 + csv_rows("L1", "A2", [500.0], start=6), encoding="utf-8")
        assert wait_for(lambda: count(db, "SELECT count(*) FROM verdicts WHERE lot = 'A1'") == 1, 20)
        [(rule, reason)] = query(db, "SELECT rule, json_extract(payload, '$.reason') FROM verdicts WHERE lot = 'A1'")
        assert rule == "oat-500" and "no rule matches" not in reason
        assert count(db, rejected) == 1                                  # the unrelated edit raised nothing
        # what SIGHUP runs, on the loop thread: the removal is confirmed
        r.daemon.call_soon(lambda d: d.check_reload(True)).result(10)
        assert [x.name for x in r.daemon.components.rules] == ["jam-340"]


def test_the_same_bad_edit_after_a_good_version_alerts_again(tmp_path: Path) -> None:
    """An unknown key raises config-rejected; fixed, the config reloads; the same bad edit again is a new
    alert (it is not taken for a repeat of the first)."""
    cfg = make_plant(tmp_path)
    db = tmp_path / "state" / "lotwarden.db"
    good = cfg.read_text()
    rejected = "SELECT count(*) FROM alerts WHERE kind = 'config-rejected'"
    with Running(cfg, reload_check_seconds=0.2) as r:
        write_atomically(cfg, good + "\nsurprise = true\n")
        assert wait_for(lambda: count(db, rejected) == 1), r.log.getvalue()
        write_atomically(cfg, good + "\n# fixed\n")
        assert wait_for(lambda: "reloaded:" in r.log.getvalue()), r.log.getvalue()
        write_atomically(cfg, good + "\nsurprise = true\n")
        assert wait_for(lambda: count(db, rejected) == 2), r.log.getvalue()
