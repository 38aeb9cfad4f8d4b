"""`lotwarden show LINE/PRODUCT/LOT`: the whole record of one lot (verdicts, dispositions, files, audit, heads)."""

from __future__ import annotations

import argparse
import json
import sys
from collections.abc import Mapping
from typing import Any

from monitor.alerts.templates import CAUTION
from monitor.commands import recordtable as rt
from monitor.commands.stateaccess import add_config_flag, open_state
from monitor.errors import LotwardenError
from monitor.record import entry, parse_lot_name, payload_of
from monitor.state import dispositions, history, lots, rule_texts

FORMATS = ("table", "json")
HEAD_KEYS = ("head", "n", "mean", "sd", "offset", "p_value", "p_holm")


class LotNotFound(LotwardenError):
    """The lot named has no verdict: unknown, or still open."""


def register(sub: argparse._SubParsersAction) -> argparse.ArgumentParser:
    p = sub.add_parser(
        "show", help="show the whole record of one lot",
        description="Every verdict of one lot with its rule text, its dispositions, the files its rows came "
                    "from, its audit records and its heads. Works while the daemon runs.",
        epilog=CAUTION)
    p.add_argument("lot", metavar="LINE/PRODUCT/LOT",
                   help='the lot, e.g. L1/OAT-500/A2 (an empty part stays empty: "/OAT-500/A2")')
    add_config_flag(p)
    p.add_argument("--format", choices=FORMATS, default="table", help="output format (default: table)")
    return p


def _detail(text: str) -> Any:
    try:
        return json.loads(text)
    except (TypeError, ValueError):
        return text


def _heads(payload: Mapping[str, Any]) -> list[dict[str, Any]]:
    heads = payload.get("heads")
    if not isinstance(heads, list):
        return []
    return [{k: h.get(k) for k in HEAD_KEYS} for h in heads if isinstance(h, Mapping)]


def lot_record(config_path: str, name: str) -> tuple[dict[str, Any], str]:
    """The JSON object of ``lotwarden show`` for ``name`` and the config's time zone; LotNotFound (exit 2)
    when the lot has no verdict, saying whether it is open."""
    try:
        line, product, lot = parse_lot_name(name)
    except ValueError:
        raise LotwardenError(f"lot {name!r} is not LINE/PRODUCT/LOT",
                             hint="e.g. L1/OAT-500/A2 (see `lotwarden lots` for the names)") from None
    with open_state(config_path) as (config, db), db.read() as conn:
        verdict_rows = history.verdicts_of_lot(conn, line, product, lot)
        if not verdict_rows:
            still_open = lots.find_open(conn, line, product, lot)
            if still_open is not None:
                raise LotNotFound(f"lot {name} has no verdict yet: it is still open "
                                  f"({still_open.n} rows so far)",
                                  hint="it is judged when it closes")
            raise LotNotFound(f"lot {name} is not in the record (no verdict, and it is not open)",
                              hint="`lotwarden lots` lists the lots that have a verdict")
        disp_rows = dispositions.of_lot(conn, line, product, lot)
        latest_disp = dispositions.for_verdicts(conn, [verdict_rows[-1].id]).get(verdict_rows[-1].id)
        texts = {h: rule_texts.by_hash(conn, h) for h in {r.rule_hash for r in verdict_rows}}
        files = history.files_of_lot(conn, line, product, lot)
        audit_rows = history.audit_of_lot(conn, line, product, lot)
    latest = entry(verdict_rows[-1], latest_disp)
    verdicts = []
    for r in verdict_rows:
        payload = payload_of(r)
        e = entry(r)
        text = texts.get(r.rule_hash)
        verdicts.append({"id": r.id, "decided_at": r.decided_at, "verdict": r.verdict, "n": e.n, "mean": e.mean,
                         "target": e.target, "unit": r.unit, "p_value": e.p_value, "reason": e.reason,
                         "rule": r.rule, "rule_version": r.rule_version, "rule_hash": r.rule_hash,
                         "close_reason": r.close_reason, "rule_text": None if text is None else text.text,
                         "result": payload})
    record = {
        "line": line, "product": product, "lot": lot, "latest": latest.to_json(), "verdicts": verdicts,
        "dispositions": [{"id": d.id, "action": d.action, "by": d.by, "note": d.note, "at": d.at,
                          "verdict_id": d.verdict_id} for d in disp_rows],
        "files": [{"path": f.path, "archived_path": f.archived_path, "sha256": f.sha256,
                   "processed_at": f.processed_at, "rows": f.rows} for f in files],
        "audit": [{"at": a.at, "event": a.event, "file_id": a.file_id, "detail": _detail(a.detail)}
                  for a in audit_rows],
        "heads": _heads(latest.payload),
    }
    return record, config.timezone


def _latest_section(rec: Mapping[str, Any], zone: str) -> list[str]:
    lt = rec["latest"]
    unit = lt["unit"]
    g = lt["giveaway"]
    d = lt["disposition"]
    lines = [f"lot {rec['line']}/{rec['product']}/{rec['lot']}",
             f"  latest verdict  {lt['verdict']} (decided {rt.local_time(lt['decided_at'], zone)} {zone})",
             f"  n               {lt['n']}",
             f"  mean            {rt.with_unit(rt.fmt_num(lt['mean']), unit)}"
             f" (target {rt.with_unit(rt.fmt_target(lt['target']), unit)})",
             f"  p-value         {rt.fmt_pvalue(lt['p_value'])}",
             f"  rule            {lt['rule']} version {lt['rule_version']}",
             f"  reason          {lt['reason']}"]
    if g is not None:
        cost = f", {g['cost']:.2f} {g['currency']}" if g.get("cost") is not None else ""
        lines.append(f"  giveaway        {rt.with_unit(rt.fmt_signed(g['per_pack']), unit)} per pack, "
                     f"{rt.with_unit(rt.fmt_signed(g['total']), unit)} in all{cost}")
    else:
        lines.append(f"  giveaway        {rt.DASH}")
    if d is not None:
        note = f": {d['note']}" if d["note"] else ""
        lines.append(f"  disposition     {d['action']} by {d['by']} at {rt.local_time(d['at'], zone)}{note}")
    else:
        lines.append("  disposition     " + ("open (nobody has disposed of it yet)"
                                            if lt["verdict"] in ("hold", "review") else rt.DASH))
    return lines


def render_table(rec: Mapping[str, Any], zone: str) -> str:
    """The record as readable sections: the latest verdict, verdicts, rule texts, dispositions, heads,
    files and audit."""
    out = _latest_section(rec, zone)
    out += ["", f"verdicts (oldest first, times in {zone})"]
    out += rt.table(
        ["id", "decided", "verdict", "n", "mean", "target", "p", "rule", "version", "closed by"],
        [[str(v["id"]), rt.local_time(v["decided_at"], zone, seconds=True), v["verdict"], str(v["n"]),
          rt.with_unit(rt.fmt_num(v["mean"]), v["unit"]), rt.with_unit(rt.fmt_target(v["target"]), v["unit"]),
          rt.fmt_pvalue(v["p_value"]), v["rule"], v["rule_version"], v["close_reason"] or rt.DASH]
         for v in rec["verdicts"]], right=(0, 3, 4, 5, 6))
    for v in rec["verdicts"]:
        out.append(f"  {v['id']}: {v['reason']}")
    seen: set[str] = set()
    for v in rec["verdicts"]:
        if v["rule_hash"] in seen:
            continue
        seen.add(v["rule_hash"])
        out += ["", f"rule {v['rule']} version {v['rule_version']} (sha256 {v['rule_hash']})"]
        if v["rule_text"] is None:
            out.append("  (its text is not stored)")
        else:
            out += ["  " + t for t in v["rule_text"].rstrip("\n").splitlines()]
    out += ["", "dispositions"]
    if rec["dispositions"]:
        out += rt.table(["id", "at", "action", "by", "verdict", "note"],
                        [[str(d["id"]), rt.local_time(d["at"], zone, seconds=True), d["action"], d["by"],
                          str(d["verdict_id"]), d["note"]] for d in rec["dispositions"]], right=(0, 4))
    else:
        out.append("  none")
    out += ["", "heads (latest verdict)"]
    if rec["heads"]:
        out += rt.table(["head", "n", "mean", "sd", "offset", "p"],
                        [[str(h["head"]), str(h["n"]), rt.fmt_num(h["mean"]), rt.fmt_num(h["sd"], 3),
                          rt.fmt_signed(h["offset"]), rt.fmt_pvalue(h["p_value"])] for h in rec["heads"]],
                        right=(1, 2, 3, 4, 5))
    else:
        out.append("  none")
    out += ["", "files"]
    if rec["files"]:
        out += rt.table(["taken from", "archived as", "sha256", "processed", "rows"],
                        [[f["path"], f["archived_path"] or rt.DASH, f["sha256"][:12],
                          rt.local_time(f["processed_at"], zone, seconds=True), str(f["rows"])]
                         for f in rec["files"]], right=(4,))
    else:
        out.append("  none")
    out += ["", "audit (oldest first)"]
    for a in rec["audit"]:
        file_part = "" if a["file_id"] is None else f"  file {a['file_id']}"
        out.append(f"  {rt.local_time(a['at'], zone, seconds=True)}  {a['event']}{file_part}")
        out.append("      " + json.dumps(a["detail"], ensure_ascii=False, sort_keys=True))
    if not rec["audit"]:
        out.append("  none")
    out += ["", CAUTION]
    return "\n".join(out) + "\n"


def run(args: argparse.Namespace) -> int:
    record, zone = lot_record(args.config, args.lot)
    if args.format == "json":
        sys.stdout.write(rt.to_json_text(record))
    else:
        sys.stdout.write(render_table(record, zone))
    return 0
