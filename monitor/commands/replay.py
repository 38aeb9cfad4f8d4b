"""`lotwarden replay`: the stored lots judged again with candidate rules, verdict then and now, read-only."""

from __future__ import annotations

import argparse
import sys

from monitor import replay as rp
from monitor.alerts.templates import CAUTION
from monitor.commands import recordtable as rt
from monitor.commands.stateaccess import add_config_flag, existing_db
from monitor.daemon.config import load_config
from monitor.errors import ConfigError
from monitor.lot import LotKey
from monitor.period import Period, parse_period, parse_stored
from monitor.rulebook import Rule, load_rules, match_rule
from monitor.state import drift as drift_store
from monitor.state import replaying
from monitor.state.database import Connection, DatabaseError, utc_iso

FORMATS = ("table", "json")
HEADERS = ("line", "product", "lot", "decided", "then", "now", "changed", "p then", "p now", "rule now")
RIGHT = (7, 8)


def register(sub: argparse._SubParsersAction) -> argparse.ArgumentParser:
    p = sub.add_parser(
        "replay", help="judge the stored lots again with candidate rules; show the verdicts then and now",
        description="Judge every stored lot again with the rules in DIR (values as stored, lots in the order they "
                    "closed, drift charts too) and compare with the verdicts stored then. Writes nothing to the "
                    "state and sends nothing; works while the daemon runs.",
        epilog=CAUTION)
    add_config_flag(p)
    p.add_argument("--rules", required=True, metavar="DIR", help="folder of candidate rule files (*.toml)")
    p.add_argument("--line", metavar="L", help="only lots of this line")
    p.add_argument("--product", metavar="P", help="only lots of this product")
    p.add_argument("--since", metavar="T",
                   help="only lots whose latest verdict was decided at or after T: an ISO date (that whole day in "
                        "the config's time zone) or date-time (without an offset: a time in the config's time zone)")
    p.add_argument("--until", metavar="T", help="only lots decided up to T (a date: up to the end of that day)")
    p.add_argument("--format", choices=FORMATS, default="table", help="output format (default: table)")
    return p


def _in_period(decided_at: str, period: Period) -> bool:
    if period.start is None and period.end is None:
        return True
    try:
        return parse_stored(decided_at) in period
    except ValueError:
        return False


def gather(conn: Connection, rules: list[Rule], period: Period, *, line: str | None, product: str | None
           ) -> tuple[list[rp.ToJudge], list[rp.SignalSeen], int]:
    """The lots to judge again (close order) with their candidate rule, the drift signals recorded then, and
    how many judged lots have no rows left in the state to judge again (left out)."""
    judged = [j for j in replaying.judged_lots(conn, line=line, product=product) if _in_period(j.decided_at, period)]
    # a verdict stored without its lot's id (older states) is found by its key
    keys = [(j.line, j.product, j.lot) for j in judged if j.lot_id is None and j.summary_id is None]
    by_key = replaying.lot_ids(conn, keys) if keys else {}
    lot_of: list[int | None] = []
    wanted: dict[int, int | None] = {}
    for j in judged:
        lot_id = j.lot_id if j.summary_id is None else None
        if lot_id is None and j.summary_id is None and (j.line, j.product, j.lot) in by_key:
            lot_id = by_key[(j.line, j.product, j.lot)].id
        lot_of.append(lot_id)
        if lot_id is not None:
            wanted[lot_id] = j.lot_rows
    stored = replaying.stored_lots(conn, list(wanted.items()))
    summaries = replaying.stored_summaries(conn, [j.summary_id for j in judged if j.summary_id is not None])
    rule_of: dict[str, Rule | None] = {}
    items: list[rp.ToJudge] = []
    for j, lot_id in zip(judged, lot_of, strict=True):
        key = LotKey(j.line, j.product, j.lot)
        then = rp.Then(key, j.verdict, j.rule, j.rule_version, j.p_value, j.decided_at)
        if j.product not in rule_of:
            rule_of[j.product] = match_rule(rules, j.product)
        rule = rule_of[j.product]
        if j.summary_id is not None and j.summary_id in summaries:
            s = summaries[j.summary_id]
            data, problem = rp.summary_lot(key, s, rule)
            items.append(rp.ToJudge(then, data, rule, problem, s.problem))
        elif lot_id is not None and lot_id in stored:
            data, problem = rp.values_lot(key, stored[lot_id], rule)
            items.append(rp.ToJudge(then, data, rule, problem))
    signals: list[rp.SignalSeen] = []
    if replaying.has_table(conn, "drift_signals"):
        rows = drift_store.signals(conn, since=utc_iso(period.start) if period.start else None,
                                   until=utc_iso(period.end) if period.end else None, line=line, product=product)
        signals = [rp.SignalSeen(s.line, s.product, s.head or None, s.lot, s.method, s.direction, s.statistic,
                                 s.limit, s.rule, s.rule_version) for s in rows]
    return items, signals, len(judged) - len(items)


def replay_state(config_path: str, rules_dir: str, *, line: str | None = None, product: str | None = None,
                 since: str | None = None, until: str | None = None) -> tuple[rp.Replay, str]:
    """The replay of the config's state with the rules in ``rules_dir``, and the config's time zone."""
    config = load_config(config_path)
    period = parse_period(since, until, config.timezone)
    rules = load_rules(rules_dir)
    path = existing_db(config, config_path)
    try:
        with replaying.open_read_only(path) as conn:
            items, signals, skipped = gather(conn, rules, period, line=line, product=product)
    except DatabaseError as exc:
        raise ConfigError(f"the state database {path} cannot be read: {exc}", path=config_path,
                        key="state.folder") from None
    return rp.replay(items, signals, skipped=skipped), config.timezone


def render_table(result: rp.Replay, zone: str) -> str:
    """One line per lot (a changed lot marked *), then the caution and the summary."""
    cells = [[r.then.key.line or rt.DASH, r.then.key.product or rt.DASH, r.then.key.lot,
              rt.local_time(r.then.decided_at, zone), r.then.verdict, r.now.verdict, "*" if r.changed else "",
              rt.fmt_pvalue(r.then.p_value), rt.fmt_pvalue(r.now.p_value), r.now.rule or rt.DASH]
             for r in result.rows]
    headers = [*HEADERS[:3], f"decided ({zone})", *HEADERS[4:]]
    lines = rt.table(headers, cells, right=RIGHT) if cells else ["no lots match"]
    return "\n".join([*lines, "", *rp.summary_lines(result.summary), "", CAUTION]) + "\n"


def run(args: argparse.Namespace) -> int:
    result, zone = replay_state(args.config, args.rules, line=args.line, product=args.product, since=args.since,
                                until=args.until)
    if args.format == "json":
        sys.stdout.write(rt.to_json_text(result.to_json()))
    else:
        sys.stdout.write(render_table(result, zone))
    return 0
