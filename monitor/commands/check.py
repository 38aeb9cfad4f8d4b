"""`lotwarden check`: judge every lot in one or more export files and print a table or JSON.

Files are taken in the order given (a folder: its export files in name order), the way the daemon takes
them, and what is still open after the last is closed: each lot printed is the lot the daemon would hold
after the same files (``monitor.lotmodel``), with ``runs`` saying how many separate runs of rows made it.
Exit 0 when every lot passes, 1 when any lot is `hold` or `review`, 2 for usage, rule or unreadable-file
errors (each named on stderr; the lots of the readable files are still printed). When stderr is a terminal,
a status line there counts files read and lots judged (never when stderr is a file or pipe).
"""

from __future__ import annotations

import argparse
import json
import math
import sys
import time
from pathlib import Path
from typing import Any, TextIO

from monitor.engine import SCREENING_NOTE
from monitor.errors import ConfigError, ExportError, LotwardenError
from monitor.keys import CONFIG
from monitor.keyschema import Invalid, convert
from monitor.lot import Verdict, excluded_counts
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
                   help="export files (CSV, weigher exports, lot summaries), or folders of them; taken in the "
                        "order given (a folder's files in name order), as the daemon would take them")
    p.add_argument("--rules", metavar="DIR", help="folder of rule files (*.toml)")
    p.add_argument("--config", metavar="FILE",
                   help=f"daemon config whose [profiles.*] tell how to read exports "
                        f"(default: {DEFAULT_CONFIG} if present)")
    p.add_argument("--target", type=float, help="target mean (ad-hoc rule)")
    p.add_argument("--unit", help="unit of --target (ad-hoc; default: the unit the values carry, if any)")
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
        try:   # the key's declaration decides `~` and relative paths, as for the daemon
            rules_dir = convert(CONFIG["rules_dir"], config["rules_dir"], config_path.resolve().parent)
        except Invalid as exc:
            raise ConfigError(f"rules_dir = {config['rules_dir']!r} — {exc.text}", path=config_path,
                              key="rules_dir") from None
        rules = load_rules(rules_dir)
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


class Progress:
    """One self-rewriting status line on stderr (files read, lots judged) while ``check`` runs.

    Shown only when the stream is a terminal; redrawn at most every ``every`` seconds and erased at the
    end, so piped or redirected stderr never gets it.
    """

    def __init__(self, stream: TextIO, every: float = 0.1) -> None:
        self.stream = stream
        self.on = _isatty(stream)
        self.every = every
        self.last = -math.inf
        self.shown = False
        self.files = (0, 0)
        self.lots = (0, 0)

    def update(self, *, files: tuple[int, int] | None = None, lots: tuple[int, int] | None = None,
               force: bool = False) -> None:
        self.files = files or self.files
        self.lots = lots or self.lots
        if not self.on:
            return
        now = time.monotonic()
        if not force and now - self.last < self.every:
            return
        self.last = now
        text = f"lotwarden: {self.files[0]}/{self.files[1]} files read"
        if self.lots[1]:
            text += f", {self.lots[0]}/{self.lots[1]} lots judged"
        self.stream.write("\r" + text + "\x1b[K")
        self.stream.flush()
        self.shown = True

    def clear(self) -> None:
        """Erase the status line (before other stderr output, and at the end)."""
        if self.shown:
            self.stream.write("\r\x1b[K")
            self.stream.flush()
            self.shown = False
            self.last = -math.inf

    def say(self, message: str) -> None:
        """A line on stderr that the status line does not overwrite."""
        self.clear()
        print(message, file=self.stream)


def _isatty(stream: TextIO) -> bool:
    try:
        return stream.isatty()
    except (AttributeError, ValueError):   # a replaced or closed stream
        return False


CHUNK = 2000  # lots per engine call: a lot's verdict does not depend on its batch (monitor.engine)


def judge(paths: list[str], rules: list[Rule], profiles: list,
          progress: Progress | None = None) -> tuple[list[Verdict], list[str]]:
    """Read, assemble and judge; returns the verdicts and one error message per unreadable file."""
    from monitor.assemble import assemble_lots
    from monitor.engine import evaluate_many
    from monitor.ingest import profile_for, read_export
    from monitor.lot import no_rule_reason, unjudged

    show = progress or Progress(sys.stderr)
    exports, errors = [], []
    show.update(files=(0, len(paths)), force=True)
    for done, path in enumerate(paths, 1):
        try:
            exports.append(read_export(path, profile_for(path, profiles)))
            for note in exports[-1].notes:
                show.say(f"lotwarden: note: {path}: {note}")
            if exports[-1].bad_rows:
                first = exports[-1].bad_rows[0]
                fate = ("rows of a lot without a usable value count in its excluded" if exports[-1].kind == "values"
                        else "an unusable lot summary is listed as a review lot")
                show.say(f"lotwarden: note: {path}: {len(exports[-1].bad_rows)} bad row(s), first on line "
                         f"{first.line}: {first.reason} ({fate})")
        except ExportError as exc:
            errors.append(str(exc))
        except OSError as exc:
            errors.append(f"{path}: cannot read: {exc.strerror or exc}")
        show.update(files=(done, len(paths)))
    # every rule is matched by its `products` (the command line's ad-hoc rule names "*": every product)
    assembled = assemble_lots(exports, lambda p: match_rule(rules, p))
    verdicts: list[Verdict | None] = [None] * len(assembled)
    by_rule: dict[int, list[int]] = {}
    judged = 0
    for i, a in enumerate(assembled):
        if a.problem is not None or a.rule is None:
            r = a.rule
            reason = a.problem or no_rule_reason(a.data.key.product)
            verdicts[i] = unjudged(a.data, reason, rule_name=r.name if r else "",
                                   rule_version=r.version if r else "", target=r.target if r else float("nan"),
                                   alternative=r.alternative if r else "", alpha=r.alpha if r else float("nan"))
            judged += 1
        else:
            by_rule.setdefault(id(a.rule), []).append(i)
    show.update(lots=(judged, len(assembled)), force=True)
    for idxs in by_rule.values():
        rule = assembled[idxs[0]].rule
        assert rule is not None
        for c in range(0, len(idxs), CHUNK):
            part = idxs[c:c + CHUNK]
            for i, v in zip(part, evaluate_many([assembled[i].data for i in part], rule), strict=True):
                verdicts[i] = v.with_runs(assembled[i].data.runs)
            judged += len(part)
            show.update(lots=(judged, len(assembled)))
    show.update(force=True)
    show.clear()
    return [v for v in verdicts if v is not None], errors


def render_json(verdicts: list[Verdict]) -> str:
    """The JSON array of ``Verdict.to_json()`` objects, one lot per line (json's C encoder: fast)."""
    if not verdicts:
        return "[]\n"
    enc = json.JSONEncoder(allow_nan=False)
    return "[\n" + ",\n".join(enc.encode(v.to_json()) for v in verdicts) + "\n]\n"


def _finite(x: float | None) -> bool:
    return x is not None and math.isfinite(x)


def _fmt(x: float | None, digits: int = 3) -> str:
    """A number with ``digits`` decimals, trailing zeros after the point dropped; "-" when there is none."""
    if x is None or not math.isfinite(x):
        return "-"
    if x != 0 and abs(x) < 10.0 ** -digits:
        return f"{x:.{digits}g}"
    if abs(x) >= 1e7:
        return f"{x:.7g}"
    text = f"{x:.{digits}f}"
    if "." in text:
        text = text.rstrip("0").rstrip(".")
    return "0" if text in ("-0", "") else text


def _df_text(df: float | None) -> str:
    """Degrees of freedom as JSON prints the number (30 for 30.0, 29.5 for 29.5)."""
    if not _finite(df):
        return "-"
    assert df is not None
    return str(int(df)) if float(df).is_integer() else repr(float(df))


def p_vs_alpha(p: float | None, alpha: float) -> str:
    """``0.0099 < 0.01`` / ``0.41 ≥ 0.05``: p with as many digits as it takes to show on which side of
    alpha it lies (the comparison that decided the verdict); "-" when no test ran."""
    if not _finite(p):
        return "-"
    assert p is not None
    if not math.isfinite(alpha):
        return f"{p:.2g}"
    text = repr(p)
    for digits in (2, 3, 4, 6, 10, 17):
        candidate = f"{p:.{digits}g}"
        shown = float(candidate)
        if (shown < alpha) == (p < alpha) and (shown != alpha or p == alpha):
            text = candidate
            break
    return f"{text} {'<' if p < alpha else '≥'} {alpha:.10g}"


_EXCLUDED_WORDS = {"blank": "blank", "not_a_number": "not a number", "not_finite": "not finite",
                   "dropped_value": "in drop_values"}


def _notes(v: Verdict) -> str:
    """What the row must say beside its numbers: an assumed unit, rows without a usable value."""
    out = []
    if v.unit_assumed:
        out.append(f"unit assumed ({v.unit})" if v.unit else "unit assumed")
    if v.excluded:
        counts = excluded_counts(v.excluded_by, v.excluded)
        why = ", ".join(f"{k} {_EXCLUDED_WORDS.get(r, r)}" for r, k in counts.items() if k)
        out.append(f"{v.excluded} excluded ({why})")
    if v.runs is not None and v.runs >= 2:
        out.append(f"{v.runs} runs (other lots' rows came in between; judged over all its values)")
    return "; ".join(out) or "-"


def _file_cell(v: Verdict) -> str:
    if not v.files:
        return "-"
    more = len(v.files) - 1
    return Path(v.files[0]).name + (f" +{more} more" if more else "")


def _signed(x: float, digits: int = 3) -> str:
    """``x`` as ``_fmt`` prints it with its sign always shown ("+2.04", "-0.6", "0")."""
    text = _fmt(x, digits)
    return text if text.startswith("-") or text == "0" else "+" + text


def _giveaway_cell(v: Verdict) -> str:
    """The giveaway per pack with its unit ("+2.04 g"), "-" when unknown."""
    g = v.giveaway
    if g is None:
        return "-"
    return _signed(g.per_pack) + (f" {v.unit}" if v.unit else "")


def giveaway_line(v: Verdict) -> str | None:
    """The lot's giveaway in words: per pack against the nominal quantity (or the target), in all over its
    packs, and its cost when the rule sets a cost per unit; "under-filled" when below. None when unknown."""
    g = v.giveaway
    if g is None:
        return None
    unit = f" {v.unit}" if v.unit else ""
    nominal = v.average_quantity.nominal if v.average_quantity is not None else None
    ref = f"nominal {_fmt(nominal)}{unit}" if nominal is not None else f"target {_fmt(v.target)}{unit}"
    side = "below" if g.per_pack < 0 else "above"
    text = (f"giveaway {_signed(g.per_pack)}{unit} per pack {side} {ref}, {_signed(g.total)}{unit} over "
            f"{plural(v.n, 'pack')}")
    if g.cost is not None:
        text += f" (cost {_signed(g.cost, 4)}{' ' + g.currency if g.currency else ''})"
    return ("under-filled: " + text) if g.per_pack < 0 else text


def render_table(verdicts: list[Verdict]) -> str:
    head = ["file", "lot", "product", "n", "mean", "sd", "target", "giveaway", "test", "stat", "df", "p vs alpha",
            "CI", "verdict", "notes"]
    rows = []
    for v in verdicts:
        ci = "-"
        if v.test and (_finite(v.ci_low) or _finite(v.ci_high)):
            ci = f"[{_fmt(v.ci_low) if _finite(v.ci_low) else '-inf'}, " \
                 f"{_fmt(v.ci_high) if _finite(v.ci_high) else '+inf'}]"
        target = _fmt(v.target) + (f" {v.unit}" if v.unit and _finite(v.target) else "")
        rows.append([_file_cell(v), v.key.lot or "-", v.key.product or "-", str(v.n), _fmt(v.mean), _fmt(v.sd),
                     target, _giveaway_cell(v), v.test or "-", _fmt(v.statistic), _df_text(v.df),
                     p_vs_alpha(v.p_value, v.alpha), ci, v.verdict.upper(), _notes(v)])
    widths = [max(len(h), *(len(r[i]) for r in rows)) if rows else len(h) for i, h in enumerate(head)]
    out = ["  ".join(h.ljust(w) for h, w in zip(head, widths, strict=True)).rstrip(),
           "  ".join("-" * w for w in widths)]
    for r, v in zip(rows, verdicts, strict=True):
        out.append("  ".join(c.ljust(w) for c, w in zip(r, widths, strict=True)).rstrip())
        out.append("      " + v.reason)
        given = giveaway_line(v)
        if given is not None:
            out.append("      " + given)
    counts = {k: sum(1 for v in verdicts if v.verdict == k) for k in ("pass", "hold", "review")}
    out.append("")
    out.append(f"{plural(len(verdicts), 'lot')}: {counts['pass']} pass, {counts['hold']} hold, "
               f"{counts['review']} review.")
    out.append(CAUTION)
    return "\n".join(out)


def plural(count: int, word: str) -> str:
    return f"{count} {word if count == 1 else word + 's'}"


def _export_files(folder: Path, profiles: list) -> list[Path]:
    """The export files of ``folder`` in name order, chosen by the one file-name filter the daemon uses
    (marker and reason files, hidden and temporary names left out; the profiles' marker suffixes too)."""
    from monitor.names import export_files

    return export_files(folder, [p.marker_suffix for p in profiles if p.marker_suffix])


def run(args: argparse.Namespace) -> int:
    profiles, config, config_path = _load_profiles(args)
    rules = _rules(args, config, config_path)
    paths: list[str] = []
    for p in args.paths:   # in the order given; a folder stands for its export files, in name order
        if Path(p).is_dir():
            paths += [str(f) for f in _export_files(Path(p), profiles)]
        else:
            paths.append(p)
    missing = [p for p in paths if not Path(p).is_file()]
    progress = Progress(sys.stderr)
    verdicts, errors = judge([p for p in paths if p not in missing], rules, profiles, progress)
    errors = [f"{p}: no such file" for p in missing] + errors
    if args.format == "json":
        sys.stdout.write(render_json(verdicts))
    else:
        print(render_table(verdicts))
    for e in errors:
        print(f"lotwarden: {e}", file=sys.stderr)
    if errors:
        return 2
    return 0 if all(v.verdict == "pass" for v in verdicts) else 1
