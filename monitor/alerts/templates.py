"""Alert message templates: the shipped set in config/templates/, overridable file by file by the operator.

Every template runs in a Jinja2 ``SandboxedEnvironment`` with ``StrictUndefined``; ``.html`` templates are
autoescaped. A set is read into memory whole and checked (compiled and test-rendered) before it is used,
so a bad edit raises ``TemplateError`` naming file and line and the caller keeps its last good set.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import jinja2
from jinja2.sandbox import SandboxedEnvironment

from monitor.alerts.alert import ALERT_KINDS
from monitor.errors import TemplateError
from monitor.resources import shipped_templates_dir

SHIPPED_DIR = shipped_templates_dir()   # the checkout's config/templates, or the wheel's copy
MESSAGE_KINDS = (*ALERT_KINDS, "group")
PARTS = ("subject.txt", "body.txt", "body.html")
CAUTION = ("lotwarden screens lots statistically; net-quantity compliance is decided under local "
           "weights-and-measures law by the competent authority.")


def required_names() -> list[str]:
    """The template file names a complete set has: ``<kind>.subject.txt``, ``.body.txt``, ``.body.html``."""
    return [f"{kind}.{part}" for kind in MESSAGE_KINDS for part in PARTS]


def _finite(value: Any) -> bool:
    return not isinstance(value, bool) and isinstance(value, (int, float)) and math.isfinite(value)


def fmt_number(value: Any, digits: int = 2) -> str:
    """A number with ``digits`` decimals, or "—" when missing / not finite."""
    if not _finite(value):
        return "—"
    return f"{value:.{digits}f}"


def fmt_general(value: Any) -> str:
    """A number in its shortest plain form (alpha 0.05, df 30), or "—" when missing / not finite."""
    if not _finite(value):
        return "—"
    return f"{float(value):g}" if float(value) != int(value) or abs(value) >= 1e15 else str(int(value))


def fmt_p(value: Any, alpha: Any = None) -> str:
    """A p-value: 4 decimals, or "< 0.0001"; with ``alpha``, as many more digits as it takes for the
    printed value to lie on the same side of alpha as the exact one (so a hold at alpha 0.01 never shows
    0.0100)."""
    if not _finite(value):
        return "—"
    p = float(value)
    a = float(alpha) if _finite(alpha) else None

    def side(x: float) -> int:
        return 0 if a is None else (x > a) - (x < a)

    if p < 1e-4 and (a is None or a >= 1e-4):
        return "< 0.0001"
    if p < 1e-4:
        for sig in range(2, 18):
            text = f"{p:.{sig}g}"
            if side(float(text)) == side(p):
                return text
        return repr(p)
    for digits in range(4, 18):
        text = f"{p:.{digits}f}"
        if side(float(text)) == side(p):
            return text
    return repr(p)


def fmt_p_equals(value: Any, alpha: Any = None) -> str:
    """"p = 0.0123" or "p < 0.0001" (never "p = < 0.0001"); "p not computed" when missing."""
    text = fmt_p(value, alpha)
    if text == "—":
        return "p not computed"
    return "p " + text if text.startswith("<") else "p = " + text


def fmt_signed(value: Any, digits: int = 2) -> str:
    """A signed offset, e.g. "+1.25" or "-0.40"."""
    if not _finite(value):
        return "—"
    return f"{value:+.{digits}f}"


def fmt_count(value: Any, singular: str, plural: str | None = None) -> str:
    """``value`` with the noun in the right number: "1 pack", "3 packs", "0 rows"."""
    n = value if isinstance(value, int) and not isinstance(value, bool) else None
    if n is None:
        return f"{value} {plural or singular + 's'}"
    return f"{n} {singular if n == 1 else (plural or singular + 's')}"


SAMPLE_DIGEST = {"period_start": "2026-11-30T05:00:00+00:00", "period_end": "2026-12-01T05:00:00+00:00",
                 "period_start_local": "2026-11-30 06:00", "period_end_local": "2026-12-01 06:00",
                 "timezone": "Europe/Berlin",
                 "lines": [{"line": "L1", "products": [{"product": "JAM-340", "unit": "g", "lots": 3, "passed": 2,
                                                        "held": 1, "reviewed": 0, "mean_offset": 0.4,
                                                        "screen": {"met": 2, "not met": 1, "undecided": 0}}],
                            "open_holds": [{"product": "JAM-340", "lot": "J7", "verdict": "hold",
                                            "decided_at": "2026-11-29T09:00:00+00:00", "age_hours": 44.0}],
                            "lots_by_code": [{"product": "JAM-340", "lot": "J7", "verdict": "hold", "n": 20,
                                              "mean": 338.9, "giveaway_per_pack": -1.1, "disposition": None}],
                            "giveaway": [{"day": "2026-11-30", "product": "JAM-340", "unit": "g", "lots": 3,
                                          "packs": 60, "total": 24.0, "cost": 0.096, "currency": "EUR",
                                          "per_pack": 0.4, "lots_without_giveaway": 0}]}],
                 "files": {"done": 3, "rejected": 1, "duplicate": 0},
                 "rejected_files": [{"path": "exports/x.csv", "reason": "no lot column", "processed_at": ""}]}


SAMPLE_DRIFT = {"method": "cusum", "direction": "up", "statistic": 4.35, "limit": 4.0,
                "lots": ["A1001", "A1002", "A1003", "A1004"], "head": "H2", "earlier_lots": 0,
                "points": [{"lot": "A1001", "z": 1.1, "upper": 0.6, "lower": 0.0, "limit": 4.0},
                           {"lot": "A1002", "z": 1.6, "upper": 1.7, "lower": 0.0, "limit": 4.0},
                           {"lot": "A1003", "z": 1.25, "upper": 2.45, "lower": 0.0, "limit": 4.0},
                           {"lot": "A1004", "z": 2.4, "upper": 4.35, "lower": 0.0, "limit": 4.0}],
                "settings": {"k": 0.5, "h": 4.0}, "rule": "oat-500", "rule_version": "0000"}


def sample_context(kind: str = "hold") -> dict[str, Any]:
    """A context with every field the shipped templates use (for the load-time test render)."""
    if kind == "digest":
        digest = {"kind": "digest", "dedup_key": "digest|x", "created_at": "2026-12-01T05:00:00+00:00", "line": "",
                  "product": "", "lot": "", "data": dict(SAMPLE_DIGEST), "chart_cid": None}
        return message_context([digest], folded=False, generated_at="2026-12-01T05:00:00+00:00")
    data: dict[str, Any] = {
        "file": "archive/2026-12-01/L2-A1001.csv", "files": ["archive/2026-12-01/L2-A1001.csv"], "line": "L2",
        "product": "OAT-500", "lot": "A1001", "rule": "oat-500", "rule_version": "0000", "n": 10, "mean": 497.4,
        "sd": 0.6, "target": 500.0, "unit": "g", "unit_assumed": True, "alternative": "two-sided", "alpha": 0.05,
        "test": "wilcoxon", "statistic": -12.7, "df": 9.0, "p_value": 1e-6, "ci_low": 497.0, "ci_high": 497.9,
        "normality": {"test": "shapiro", "statistic": 0.97, "p_value": 0.8, "passed": True, "note": ""},
        "power": 0.9, "n_for_power": 8, "verdict": "hold", "reason": "mean below target", "excluded": 1,
        "excluded_by": {"blank": 1, "not_a_number": 0, "not_finite": 0, "dropped_value": 0},
        "wilcoxon": {"method": "exact", "zeros": 1, "n_used": 9},
        "average_quantity": {"passed": False, "reason": "average-quantity screen fails: 1 pack short"},
        "heads": [{"head": "H1", "n": 10, "mean": 497.4, "sd": 0.6, "offset": -2.6, "p_value": 1e-5, "p_holm": 3e-5}],
        "heads_test": {"test": "anova", "statistic": 9.4, "p_value": 0.0002, "df_between": 2, "df_within": 27,
                       "note": "one-way ANOVA across 3 heads, F(2, 27)"}, "heads_test_note": None,
        "values": [497.0, 498.0], "path": "exports/x.csv", "error": "example", "channel": "email"}
    if kind == "verdict-changed":
        data.update(verdict="pass", reason="no shift of the mean shown", why="12 late values reopened the lot",
                    previous={"verdict": "hold", "decided_at": "2026-12-01T05:00:00+00:00",
                              "reason": "mean below target", "rule": "oat-500", "rule_version": "0000", "n": 8,
                              "mean": 497.1, "p_value": 1e-5})
    if kind in ("disposition", "reminder", "rule-changed", "drift"):
        told = {"verdict_id": 7, "verdict": "hold", "decided_at": "2026-12-01T05:00:00+00:00", "rule": "oat-500",
                "rule_version": "0000", "n": 10, "mean": 497.4, "target": 500.0, "unit": "g", "p_value": 1e-6,
                "reason": "mean below target"}
        samples: dict[str, dict[str, Any]] = {
            "disposition": {"disposition": {"id": 1, "action": "rework", "by": "I. Marsh",
                                            "note": "re-checked 20 packs", "at": "2026-12-01T07:00:00+00:00"},
                            "verdict": told},
            "reminder": {"verdict": told, "number": 1, "open_minutes": 240.0},
            "rule-changed": {"rule": "oat-500", "file": "rules/oat-500.toml", "old_version": "0000",
                             "new_version": "1111", "changes": [{"key": "alpha", "old": 0.05, "new": 0.01}]},
            "drift": {"drift": dict(SAMPLE_DRIFT)},
        }
        extra = samples[kind]
        one = {"kind": kind, "dedup_key": f"{kind}|x", "created_at": "2026-12-01T07:00:00+00:00",
               "line": "" if kind == "rule-changed" else "L2", "product": "" if kind == "rule-changed" else "OAT-500",
               "lot": "" if kind == "rule-changed" else "A1004" if kind == "drift" else "A1001", "data": extra,
               "chart_cid": "chart0" if kind == "drift" else None}
        return message_context([one], folded=False, generated_at="2026-12-01T07:00:00+00:00")
    item: dict[str, Any] = {"kind": "verdict-changed" if kind == "verdict-changed" else "hold",
            "dedup_key": "hold|L2|OAT-500|A1001|0000", "created_at": "2026-12-01T06:00:00+00:00",
            "line": "L2", "product": "OAT-500", "lot": "A1001", "data": data, "chart_cid": "chart0"}
    items: list[dict[str, Any]] = [item]
    if kind == "group":           # a group shows every partial: a verdict, a changed verdict, a generic alert
        changed = sample_context("verdict-changed")["alert"]
        items = [item, changed, {"kind": "file-rejected", "dedup_key": "file-rejected|1",
                                 "created_at": "2026-12-01T06:00:00+00:00", "line": "", "product": "", "lot": "",
                                 "data": {"path": "exports/x.csv", "line": None, "key": None}, "chart_cid": None}]
    return message_context(items, folded=False, generated_at="2026-12-01T06:00:00+00:00")


def message_context(items: Sequence[Mapping[str, Any]], *, folded: bool, generated_at: str) -> dict[str, Any]:
    """The context every template gets: ``alerts`` (list), ``alert`` and ``data`` (the first), counts."""
    first = items[0]
    kinds: dict[str, int] = {}
    for it in items:
        kinds[it["kind"]] = kinds.get(it["kind"], 0) + 1
    return {"alerts": list(items), "alert": first, "data": first["data"], "count": len(items), "kinds": kinds,
            "folded": folded, "generated_at": generated_at, "caution": CAUTION,
            "lines": sorted({it["line"] for it in items if it["line"]})}


@dataclass(frozen=True)
class RenderedMessage:
    """Subject (not yet header-cleaned), plain-text body and HTML body of one message."""

    subject: str
    text: str
    html: str


class TemplateSet:
    """One checked, in-memory set of templates. Build with ``TemplateSet.load(operator_dir)``."""

    def __init__(self, sources: dict[str, str], origins: dict[str, Path]) -> None:
        self._origins = origins
        self._env = SandboxedEnvironment(
            loader=jinja2.DictLoader(sources), undefined=jinja2.StrictUndefined,
            autoescape=jinja2.select_autoescape(enabled_extensions=("html",), default_for_string=False),
            trim_blocks=True, lstrip_blocks=True, keep_trailing_newline=True, auto_reload=False)
        self._env.filters.update(num=fmt_number, pvalue=fmt_p, p_equals=fmt_p_equals, signed=fmt_signed,
                                 general=fmt_general, count=fmt_count)
        self._compiled: dict[str, jinja2.Template] = {}
        for name in sorted(sources):
            self._compiled[name] = self._compile(name)
        for kind in MESSAGE_KINDS:
            sample = sample_context(kind)
            for part in PARTS:
                self._render(f"{kind}.{part}", sample)

    @classmethod
    def load(cls, operator_dir: Path | None = None, shipped_dir: Path = SHIPPED_DIR) -> TemplateSet:
        """Read the shipped set, let same-named files in ``operator_dir`` win, check everything."""
        sources: dict[str, str] = {}
        origins: dict[str, Path] = {}
        for folder, is_operator in ((shipped_dir, False), (operator_dir, True)):
            if folder is None:
                continue
            if not folder.is_dir():
                raise TemplateError("template folder does not exist or is not a folder", path=folder,
                                    key="alerts.templates" if is_operator else None)
            for f in sorted(folder.iterdir()):
                if not f.is_file() or f.suffix not in (".txt", ".html") or f.name.startswith("."):
                    continue
                if is_operator and not f.name.startswith("_") and f.name not in required_names():
                    raise TemplateError(f"unknown template name {f.name!r}", path=f,
                                        hint="use a shipped name (e.g. hold.subject.txt, group.body.html) or "
                                             "start a partial's name with '_'")
                try:
                    sources[f.name] = f.read_text(encoding="utf-8")
                except (OSError, UnicodeDecodeError) as exc:
                    raise TemplateError(f"cannot read template: {exc}", path=f) from None
                origins[f.name] = f
        missing = [n for n in required_names() if n not in sources]
        if missing:
            raise TemplateError("template set is incomplete: missing " + ", ".join(missing), path=shipped_dir)
        return cls(sources, origins)

    @staticmethod
    def check(operator_dir: Path | None) -> None:
        """Raise TemplateError if the set with ``operator_dir`` would not load (for config validation)."""
        TemplateSet.load(operator_dir)

    def origin(self, name: str) -> Path | None:
        """The file a template name was read from."""
        return self._origins.get(name)

    def render(self, kind: str, context: Mapping[str, Any]) -> RenderedMessage:
        """Render the three parts for ``kind`` ("group" for a grouped message); raises TemplateError."""
        return RenderedMessage(*(self._render(f"{kind}.{part}", context) for part in PARTS))

    def _compile(self, name: str) -> jinja2.Template:
        try:
            return self._env.get_template(name)
        except jinja2.TemplateSyntaxError as exc:
            raise TemplateError(f"template syntax error: {exc.message}", path=self._origins.get(name, name),
                                line=exc.lineno) from None

    def _render(self, name: str, context: Mapping[str, Any]) -> str:
        try:
            return self._compiled[name].render(**context)
        except jinja2.TemplateSyntaxError as exc:
            raise TemplateError(f"template syntax error: {exc.message}",
                                path=self._origins.get(exc.name or name, name), line=exc.lineno) from None
        except jinja2.TemplateError as exc:
            raise TemplateError(f"template fails to render: {exc}", path=self._origins.get(name, name)) from None
        except Exception as exc:   # a sandbox template may raise anything a filter or operator raises
            raise TemplateError(f"template fails to render: {type(exc).__name__}: {exc}",
                                path=self._origins.get(name, name)) from None
