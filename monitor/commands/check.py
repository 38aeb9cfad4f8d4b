"""`lotwarden check`: judge every lot in one or more export files and print a table or JSON.

Exit 0 when every lot passes, 1 when any lot is `hold` or `review`, 2 for usage, rule or unreadable-file
errors (each named on stderr; the lots of the readable files are still printed).
"""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path
from typing import Any

from monitor.engine import SCREENING_NOTE
from monitor.errors import ConfigError, ExportError, LotwardenError
from monitor.lot import Verdict
from monitor.rulebook import ALTERNATIVES, NormalityRule, Rule, load_rules, match_rule
from monitor.tomlfile import read_toml

DEFAULT_CONFIG = Path("config/lotwarden.toml")
DEFAULT_RULES = Path("rules")
CAUTION = SCREENING_NOTE


def register(sub: argparse._SubParsersAction) -> argparse.ArgumentParser:
    p = sub.add_parser(
        "check", help="judge the lots in export files",
        description="Judge every lot in the given export files. Rules come from --rules DIR (default: the "
        "config's rules_dir, else ./rules); --target and the other ad-hoc options judge every lot without "
        "rule files, or override the matching rule's keys when --rules is also given.",
        epilog=CAUTION)
    p.add_argument("paths", nargs="+", metavar="PATH",
                   help="export files (CSV, weigher exports, lot summaries), or folders of them")
    p.add_argument("--rules", metavar="DIR", help="folder of rule files (*.toml)")
    p.add_argument("--config", metavar="FILE",
                   help=f"daemon config whose [profiles.*] tell how to read exports (default: {DEFAULT_CONFIG} if present)")
    p.add_argument("--target", type=float, help="target mean (ad-hoc rule)")
    p.add_argument("--unit", help="unit of --target (ad-hoc; default: the values' unit, else g)")
    p.add_argument("--alternative", choices=ALTERNATIVES,
                   help="two-sided: off target either way; less: low fill; greater: giveaway (default two-sided)")
    p.add_argument("--alpha", type=float, help="significance level in (0, 0.5] (default 0.05)")
    p.add_argument("--min-n", type=int, dest="min_n", help="smallest lot to judge (default 5)")
    p.add_argument("--shift", type=float, help="shift of interest for the power report (same unit as target)")
    p.add_argument("--known-sd", type=float, dest="known_sd", help="known process sd: use the z-test")
    p.add_argument("--no-normality-gate", action="store_true", dest="no_gate",
                   help="skip the Shapiro–Wilk gate (default: gate at 0.05, review on failure)")
    p.add_argument("--format", choices=("table", "json"), default="table")
    return p


def _adhoc_overrides(args: argparse.Namespace) -> dict[str, Any]:
    out: dict[str, Any] = {}
    for key in ("target", "alternative", "alpha", "min_n", "known_sd"):
        if getattr(args, key) is not None:
            out[key] = getattr(args, key)
    if args.shift is not None:
        out["shift_of_interest"] = args.shift
    if args.unit is not None:
        from monitor.units import canonical_unit

        unit = canonical_unit(args.unit)
        if unit is None:
            raise ConfigError(f"--unit {args.unit!r} is not a known unit")
        out["unit"] = unit
    return out


def _validate_overrides(ov: dict[str, Any]) -> None:
    """Check ad-hoc values with the same validation as rule files (messages name the option)."""
    table: dict[str, Any] = {"name": "ad-hoc", "target": ov.get("target", 0.0), "unit": ov.get("unit", "g")}
    table.update({k: v for k, v in ov.items() if k not in ("target", "unit")})
    try:
        Rule.from_toml(table, source="command line")
    except LotwardenError as exc:
        flag = "--" + (exc.key or "").replace("_", "-").replace("shift-of-interest", "shift")
        raise ConfigError(exc.message, key=flag) from None


def _load_profiles(args: argparse.Namespace) -> tuple[list, dict[str, Any] | None, Path | None]:
    from monitor.ingest import FeedProfile

    path = Path(args.config) if args.config else (DEFAULT_CONFIG if DEFAULT_CONFIG.is_file() else None)
    if path is None:
        return [], None, None
    table, _ = read_toml(path, what="config file")
    profiles_table = table.get("profiles", {})
    if not isinstance(profiles_table, dict):
        raise ConfigError("profiles must be a table of [profiles.<name>] tables", path=path, key="profiles")
    profiles = [FeedProfile.from_toml(t, source=str(path), name=name) for name, t in profiles_table.items()]
    return profiles, table, path


def _rules(args: argparse.Namespace, config: dict[str, Any] | None, config_path: Path | None) -> list[Rule]:
    overrides = _adhoc_overrides(args)
    normality = NormalityRule(enabled=not args.no_gate)
    if overrides:
        _validate_overrides(overrides)
    if args.rules:
        rules = load_rules(args.rules)
    elif "target" in overrides:
        overrides.setdefault("unit", "")  # no --unit: judge in the unit the values were exported in
        return [Rule.adhoc(normality=normality, **overrides)]
    elif config is not None and isinstance(config.get("rules_dir"), str):
        assert config_path is not None
        rules = load_rules((config_path.parent / config["rules_dir"]).resolve())
    elif DEFAULT_RULES.is_dir():
        rules = load_rules(DEFAULT_RULES)
    else:
        raise ConfigError("no target to judge against", hint="give --target X, or --rules DIR with rule files")
    if not rules:
        raise ConfigError("the rules folder holds no *.toml rule files", path=args.rules or DEFAULT_RULES)
    if overrides or args.no_gate:
        rules = [r.replace(**overrides, normality=r.normality if not args.no_gate else
                           NormalityRule(enabled=False)) for r in rules]
    return rules


def judge(paths: list[str], rules: list[Rule], profiles: list) -> tuple[list[Verdict], list[str]]:
    """Read, assemble and judge; returns the verdicts and one error message per unreadable file."""
    from monitor.assemble import assemble_lots
    from monitor.engine import evaluate_many
    from monitor.ingest import profile_for, read_export
    from monitor.lot import unjudged

    exports, errors = [], []
    for path in paths:
        try:
            exports.append(read_export(path, profile_for(path, profiles)))
            for note in exports[-1].notes:
                print(f"lotwarden: note: {path}: {note}", file=sys.stderr)
            if exports[-1].bad_rows:
                first = exports[-1].bad_rows[0]
                print(f"lotwarden: note: {path}: {len(exports[-1].bad_rows)} bad row(s) left out, first on line "
                      f"{first.line}: {first.reason}", file=sys.stderr)
        except ExportError as exc:
            errors.append(str(exc))
        except OSError as exc:
            errors.append(f"{path}: cannot read: {exc.strerror or exc}")
    single = rules[0] if len(rules) == 1 and rules[0].name == "ad-hoc" else None
    assembled = assemble_lots(exports, (lambda p: single) if single else (lambda p: match_rule(rules, p)))
    verdicts: list[Verdict | None] = [None] * len(assembled)
    by_rule: dict[int, list[int]] = {}
    for i, a in enumerate(assembled):
        if a.problem is not None or a.rule is None:
            r = a.rule
            verdicts[i] = unjudged(a.data, a.problem or "no rule", rule_name=r.name if r else "",
                                   rule_version=r.version if r else "", target=r.target if r else float("nan"),
                                   alternative=r.alternative if r else "", alpha=r.alpha if r else float("nan"))
        else:
            by_rule.setdefault(id(a.rule), []).append(i)
    for idxs in by_rule.values():
        rule = assembled[idxs[0]].rule
        assert rule is not None
        for i, v in zip(idxs, evaluate_many([assembled[i].data for i in idxs], rule)):
            verdicts[i] = v
    return [v for v in verdicts if v is not None], errors


def _fmt(x: float | None, digits: int = 4) -> str:
    if x is None:
        return "-"
    return f"{x:.{digits}g}" if abs(x) < 1e-3 and x != 0 else f"{x:.{digits}f}".rstrip("0").rstrip(".") \
        if abs(x) < 1e6 else f"{x:.4g}"


def render_table(verdicts: list[Verdict]) -> str:
    head = ["file", "lot", "product", "n", "mean", "sd", "target", "test", "stat", "df", "p", "CI", "verdict"]
    rows = []
    for v in verdicts:
        ci = f"[{_fmt(v.ci_low, 3) if v.ci_low is not None else '-inf'}, " \
             f"{_fmt(v.ci_high, 3) if v.ci_high is not None else '+inf'}]" if v.test else "-"
        p = "-" if v.p_value is None else (f"{v.p_value:.2e}" if v.p_value < 1e-3 else f"{v.p_value:.4f}")
        rows.append([Path(v.files[0]).name if v.files else "-", v.key.lot, v.key.product, str(v.n),
                     _fmt(v.mean, 3), _fmt(v.sd, 3), _fmt(v.target, 3) + (f" {v.unit}" if v.unit else ""),
                     v.test or "-", _fmt(v.statistic, 3), _fmt(v.df, 0), p, ci, v.verdict.upper()])
    widths = [max(len(h), *(len(r[i]) for r in rows)) if rows else len(h) for i, h in enumerate(head)]
    out = ["  ".join(h.ljust(w) for h, w in zip(head, widths)),
           "  ".join("-" * w for w in widths)]
    for r, v in zip(rows, verdicts):
        out.append("  ".join(c.ljust(w) for c, w in zip(r, widths)))
        out.append("      " + v.reason)
    counts = {k: sum(1 for v in verdicts if v.verdict == k) for k in ("pass", "hold", "review")}
    out.append("")
    out.append(f"{len(verdicts)} lots: {counts['pass']} pass, {counts['hold']} hold, {counts['review']} review.")
    out.append(CAUTION)
    return "\n".join(out)


def run(args: argparse.Namespace) -> int:
    profiles, config, config_path = _load_profiles(args)
    rules = _rules(args, config, config_path)
    paths: list[str] = []
    for p in args.paths:   # a folder stands for the export files in it (hidden names left out)
        if Path(p).is_dir():
            paths += [str(f) for f in sorted(Path(p).iterdir()) if f.is_file() and not f.name.startswith(".")]
        else:
            paths.append(p)
    missing = [p for p in paths if not Path(p).is_file()]
    verdicts, errors = judge([p for p in paths if p not in missing], rules, profiles)
    errors = [f"{p}: no such file" for p in missing] + errors
    if args.format == "json":
        json.dump([v.to_json() for v in verdicts], sys.stdout, indent=2, allow_nan=False)
        sys.stdout.write("\n")
    else:
        print(render_table(verdicts))
    for e in errors:
        print(f"lotwarden: {e}", file=sys.stderr)
    if errors:
        return 2
    return 0 if all(v.verdict == "pass" for v in verdicts) else 1
