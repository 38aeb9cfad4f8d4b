"""Rule files: one TOML file per rule, validated on load into frozen Rule objects.

A rule says how one product's lots are judged: the target and unit, the sided test and alpha, the
minimum lot size, an optional known process sd (z-test), the shift of interest for power, and the
normality gate. Unknown keys are errors, so a typo never falls back to a default silently.
"""

from __future__ import annotations

import dataclasses
import fnmatch
import hashlib
import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from monitor.errors import RuleError
from monitor.tomlfile import read_toml
from monitor.units import ALLOWED as ALLOWED_UNITS
from monitor.units import canonical_unit

ALTERNATIVES = ("two-sided", "less", "greater")
ON_FAIL = ("review", "wilcoxon", "ignore")
ON_UNASSESSED = ("proceed", "review")

# One table of every key: (default, one-line doc). Feeds validation, `--help` and the docs test.
RULE_KEYS: dict[str, tuple[Any, str]] = {
    "name": (None, "rule name shown in verdicts and alerts (required)"),
    "products": (("*",), 'product codes this rule judges; "*" matches any (glob patterns allowed)'),
    "target": (None, "target mean fill in `unit` (required)"),
    "unit": (None, f"unit of target and values after conversion: {ALLOWED_UNITS} (required)"),
    "alternative": ("two-sided", "two-sided (off target either way), less (low fill), greater (giveaway)"),
    "alpha": (0.05, "significance level of the test, in (0, 0.5]"),
    "min_n": (5, "smallest lot the test may judge; smaller lots get `review` (integer >= 2)"),
    "known_sd": (None, "known process standard deviation in `unit`: switches to the z-test (> 0)"),
    "shift_of_interest": (None, "mean shift (in `unit`, > 0) whose detection power is reported"),
    "target_power": (0.8, "power the reported sample-size-for-power aims at, in (0, 1)"),
    "idle_minutes": (30.0, "daemon: a lot with no new values for this long is closed and judged (> 0)"),
    "nominal": (None, (
        "nominal quantity on the label, in `unit` (any unit: `kg` = 1 is 1000 g; 5 g/mL to 25 kg/L after "
        "conversion): adds the average-quantity screen (TNE, T1/T2 packs, mean); a failed screen holds the lot, "
        "an undecided one sends it to review; a screen, not a legal verdict")),
    "inspection": ("full", (
        '"full": every pack of the lot is in the export (packers\' rules: mean >= nominal, at most `t1_share` '
        'below T1, none below T2) | "sample": the export is a sample of a batch of `batch_size` packs (reference '
        'test, SI 2006/659 Sch. 2); needs `nominal`')),
    "batch_size": (None, (
        'packs in the batch the sample was drawn from (whole number >= 1); required for inspection = "sample", '
        "which picks the published plan by it")),
    "sampling_plan": ("single", (
        'plan for inspection = "sample": "single" (SI 2006/659 Sch. 2 ¶3.3) | "double" (¶3.7 ff., Directive '
        '76/211/EEC Annex II 2.2.1) | "destructive" (20 packs, batches >= 100; Annex II 2.2.2)')),
    "t1_share": (0.025, (
        'inspection = "full": share of packs allowed below T1 (nominal - TNE), in [0, 0.025]; 0.025 is the UK '
        "2.5 % (trading standards guidance on SI 2006/659); Germany's Fertigpackungsverordnung §9(3) allows "
        "2 % (0.02)")),
    "description": ("", "free text for people"),
}
NORMALITY_KEYS: dict[str, tuple[Any, str]] = {
    "test": ("shapiro", 'normality test: "shapiro" (Shapiro–Wilk)'),
    "alpha": (0.05, "normality is rejected when its p-value is below this, in (0, 0.5]"),
    "on_fail": ("review", 'what a failed gate does: "review" | "wilcoxon" | "ignore"'),
    "on_unassessed": ("proceed", 'lots known only by n/mean/sd: "proceed" with the t-test or "review"'),
}


@dataclass(frozen=True)
class NormalityRule:
    """The normality gate of a rule."""

    test: str = "shapiro"
    alpha: float = 0.05
    on_fail: str = "review"
    on_unassessed: str = "proceed"
    enabled: bool = True


@dataclass(frozen=True)
class Rule:
    """How the lots of some products are judged. Build with ``Rule.from_toml`` or ``Rule.adhoc``."""

    name: str
    target: float
    unit: str
    products: tuple[str, ...] = ("*",)
    alternative: str = "two-sided"
    alpha: float = 0.05
    min_n: int = 5
    known_sd: float | None = None
    shift_of_interest: float | None = None
    target_power: float = 0.8
    idle_minutes: float = 30.0
    nominal: float | None = None
    inspection: str = "full"
    batch_size: int | None = None
    sampling_plan: str = "single"
    t1_share: float = 0.025
    description: str = ""
    normality: NormalityRule = field(default_factory=NormalityRule)
    source: str | None = None
    content_hash: str = ""

    def matches(self, product: str) -> bool:
        """True if this rule judges ``product`` (exact code or glob; "*" matches any, also empty)."""
        return any(p == "*" or p == product or fnmatch.fnmatchcase(product, p) for p in self.products)

    @property
    def version(self) -> str:
        """Short content hash that names this version of the rule in audit records."""
        return self.content_hash[:12]

    def replace(self, **changes: Any) -> Rule:
        return dataclasses.replace(self, **changes)

    @classmethod
    def adhoc(cls, **overrides: Any) -> Rule:
        """A rule from command-line options, with the documented defaults for the rest."""
        normality = overrides.pop("normality", NormalityRule())
        values = {k: v for k, v in overrides.items() if v is not None}
        values.setdefault("name", "ad-hoc")
        values.setdefault("unit", "g")
        rule = cls(normality=normality, **values)
        blob = repr(sorted(dataclasses.asdict(rule).items())).encode()
        return dataclasses.replace(rule, content_hash=hashlib.sha256(blob).hexdigest())

    @classmethod
    def from_toml(cls, table: Mapping[str, Any], *, source: str = "<rule>", content_hash: str = "") -> Rule:
        """Validate a parsed TOML table; errors name ``source`` and the key path."""
        return _parse_rule(table, source, content_hash)

    @classmethod
    def from_file(cls, path: str | Path) -> Rule:
        table, digest = read_toml(path, what="rule file", error=RuleError)
        return _parse_rule(table, str(Path(path)), digest)


def load_rules(folder: str | Path) -> list[Rule]:
    """Load every ``*.toml`` in ``folder`` (sorted by name). Any bad file raises RuleError."""
    d = Path(folder)
    if not d.is_dir():
        raise RuleError("rules folder does not exist or is not a folder", path=d)
    rules = [Rule.from_file(p) for p in sorted(d.glob("*.toml")) if not p.name.startswith(".")]
    seen: dict[str, str] = {}
    for r in rules:
        if r.name in seen:
            raise RuleError(f"rule name {r.name!r} is also used by {seen[r.name]}", path=r.source, key="name",
                            hint="every rule needs its own name")
        seen[r.name] = r.source or ""
    return rules


def match_rule(rules: list[Rule], product: str) -> Rule | None:
    """The rule for ``product``: an exact product code wins over a pattern; then file order."""
    exact = [r for r in rules if product in r.products]
    if exact:
        return exact[0]
    for r in rules:
        if r.matches(product):
            return r
    return None


# ---------------------------------------------------------------------------------------------
def _fail(source: str, key: str, message: str, hint: str | None = None) -> RuleError:
    return RuleError(message, path=source, key=key, hint=hint)


def _number(table: Mapping[str, Any], key: str, source: str, keypath: str) -> float:
    v = table[key]
    if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
        raise _fail(source, keypath, f"{key} = {v!r} — must be a finite number")
    return float(v)


def _in_range(v: float, lo: float, hi: float, source: str, keypath: str, lo_open: bool = True,
              hi_open: bool = False) -> float:
    ok_lo = v > lo if lo_open else v >= lo
    ok_hi = v < hi if hi_open else v <= hi
    if not (ok_lo and ok_hi):
        lb, rb = ("(" if lo_open else "["), (")" if hi_open else "]")
        raise _fail(source, keypath, f"{keypath.split('.')[-1]} = {v:g} — must be in {lb}{lo:g}, {hi:g}{rb}")
    return v


def _choice(table: Mapping[str, Any], key: str, allowed: tuple[str, ...], source: str, keypath: str) -> str:
    v = table[key]
    if v not in allowed:
        raise _fail(source, keypath, f"{key} = {v!r} — must be one of " + ", ".join(repr(a) for a in allowed))
    return str(v)


def _unknown(table: Mapping[str, Any], known: Mapping[str, Any], source: str, prefix: str) -> None:
    for k in table:
        if k not in known:
            raise _fail(source, prefix + k, f"unknown key {k!r}",
                        hint="allowed keys: " + ", ".join(sorted(known)))


def _whole(table: Mapping[str, Any], key: str, lo: int, source: str) -> int:
    v = table[key]
    if isinstance(v, bool) or not isinstance(v, int) or v < lo:
        raise _fail(source, key, f"{key} = {v!r} — must be a whole number >= {lo}")
    return v


def _quantity_keys(table: Mapping[str, Any], source: str, unit: str) -> dict[str, Any]:
    """The average-quantity keys (nominal, inspection, batch_size, sampling_plan, t1_share), cross-checked."""
    from monitor.quantity import (
        INSPECTIONS,
        SAMPLING_PLANS,
        TABLE_MAX,
        TABLE_MIN,
        nominal_in_table_unit,
    )

    out: dict[str, Any] = {}
    if "nominal" not in table:
        for key in ("inspection", "batch_size", "sampling_plan", "t1_share"):
            if key in table:
                raise _fail(source, key, f"{key} is set but the rule has no nominal",
                            hint="set nominal (the quantity on the label) to use the average-quantity screen")
        return out
    v = _number(table, "nominal", source, "nominal")
    if not v > 0:
        raise _fail(source, "nominal", f"nominal = {v:g} — must be > 0")
    q, base = nominal_in_table_unit(v, unit)
    if not (TABLE_MIN <= q <= TABLE_MAX):
        raise _fail(source, "nominal", f"nominal = {v:g} {unit} is {q.normalize():f} {base} — outside the published "
                    "TNE table (5 g/mL to 25 kg/L)", hint="no tolerable negative error is published for it; "
                    "remove nominal for this rule")
    out["nominal"] = v
    inspection = _choice(table, "inspection", INSPECTIONS, source, "inspection") if "inspection" in table else "full"
    out["inspection"] = inspection
    if inspection == "sample":
        if "batch_size" not in table:
            raise _fail(source, "batch_size", 'missing batch_size — inspection = "sample" needs the packs in the batch',
                        hint=RULE_KEYS["batch_size"][1])
        out["batch_size"] = _whole(table, "batch_size", 1, source)
        if "sampling_plan" in table:
            out["sampling_plan"] = _choice(table, "sampling_plan", SAMPLING_PLANS, source, "sampling_plan")
        if out.get("sampling_plan") == "destructive" and out["batch_size"] < 100:
            raise _fail(source, "sampling_plan", f'sampling_plan = "destructive" with batch_size = {out["batch_size"]}'
                        " — destructive testing is for batches of 100 or more (Directive 76/211/EEC Annex II 2.2.2)")
        if "t1_share" in table:
            raise _fail(source, "t1_share", 't1_share is for inspection = "full"',
                        hint='under "sample" the published plan for batch_size sets the packs allowed below T1')
    else:
        for key in ("batch_size", "sampling_plan"):
            if key in table:
                raise _fail(source, key, f'{key} is for inspection = "sample" (this rule inspects every pack)',
                            hint='set inspection = "sample" if the export is a sample of a batch')
        if "t1_share" in table:
            out["t1_share"] = _in_range(_number(table, "t1_share", source, "t1_share"), 0, 0.025, source,
                                        "t1_share", lo_open=False)
    return out


def _parse_rule(table: Mapping[str, Any], source: str, content_hash: str) -> Rule:
    _unknown(table, {**RULE_KEYS, "normality": None}, source, "")
    for req in ("name", "target", "unit"):
        if req not in table:
            raise _fail(source, req, f"missing required key {req!r}", hint=RULE_KEYS[req][1])
    name = table["name"]
    if not isinstance(name, str) or not name.strip():
        raise _fail(source, "name", f"name = {name!r} — must be a non-empty string")
    products = table.get("products", ["*"])
    if isinstance(products, str):
        products = [products]
    if (not isinstance(products, list) or not products
            or not all(isinstance(p, str) and p.strip() for p in products)):
        raise _fail(source, "products", f"products = {products!r} — must be a non-empty list of product codes")
    unit = canonical_unit(table["unit"]) if isinstance(table["unit"], str) else None
    if unit is None:
        raise _fail(source, "unit", f"unit = {table['unit']!r} — must be one of {ALLOWED_UNITS}")
    values: dict[str, Any] = {
        "name": name.strip(),
        "products": tuple(p.strip() for p in products),
        "unit": unit,
        "target": _number(table, "target", source, "target"),
    }
    if "alternative" in table:
        values["alternative"] = _choice(table, "alternative", ALTERNATIVES, source, "alternative")
    if "alpha" in table:
        values["alpha"] = _in_range(_number(table, "alpha", source, "alpha"), 0, 0.5, source, "alpha")
    if "min_n" in table:
        v = table["min_n"]
        if isinstance(v, bool) or not isinstance(v, int) or v < 2:
            raise _fail(source, "min_n", f"min_n = {v!r} — must be a whole number >= 2")
        values["min_n"] = v
    values.update(_quantity_keys(table, source, unit))
    for key in ("known_sd", "shift_of_interest", "idle_minutes"):
        if key in table:
            v = _number(table, key, source, key)
            if not v > 0:
                raise _fail(source, key, f"{key} = {v:g} — must be > 0")
            values[key] = v
    if "target_power" in table:
        values["target_power"] = _in_range(_number(table, "target_power", source, "target_power"),
                                           0, 1, source, "target_power", hi_open=True)
    if "description" in table:
        if not isinstance(table["description"], str):
            raise _fail(source, "description", "description must be a string")
        values["description"] = table["description"]
    norm = table.get("normality", {})
    if not isinstance(norm, dict):
        raise _fail(source, "normality", "normality must be a table: [normality]")
    _unknown(norm, NORMALITY_KEYS, source, "normality.")
    nvals: dict[str, Any] = {}
    if "test" in norm:
        nvals["test"] = _choice(norm, "test", ("shapiro",), source, "normality.test")
    if "alpha" in norm:
        nvals["alpha"] = _in_range(_number(norm, "alpha", source, "normality.alpha"), 0, 0.5, source,
                                   "normality.alpha")
    if "on_fail" in norm:
        nvals["on_fail"] = _choice(norm, "on_fail", ON_FAIL, source, "normality.on_fail")
    if "on_unassessed" in norm:
        nvals["on_unassessed"] = _choice(norm, "on_unassessed", ON_UNASSESSED, source, "normality.on_unassessed")
    return Rule(normality=NormalityRule(**nvals), source=source, content_hash=content_hash, **values)
