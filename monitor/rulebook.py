"""Rule files: one TOML file per rule, validated on load into frozen Rule objects.

A rule says how one product's lots are judged: the target and unit, the sided test and alpha, the
minimum lot size, an optional known process sd (z-test), the shift of interest for power, and the
normality gate. Unknown keys are errors, so a typo never falls back to a default silently.
"""

from __future__ import annotations

import dataclasses
import fnmatch
import hashlib
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from monitor.errors import RuleError
from monitor.keys import DRIFT, NORMALITY, RULE, read
from monitor.tomlfile import read_toml_text

ALTERNATIVES = ("two-sided", "less", "greater")
ON_FAIL = ("review", "wilcoxon", "ignore")
ON_UNASSESSED = ("proceed", "review")
# Every key of a rule file and of its [normality] table is declared in monitor.keys (RULE, NORMALITY);
# these are their {key: (default, doc)} views for older callers.
RULE_KEYS: dict[str, tuple[Any, str]] = {k: v for k, v in RULE.table().items() if k not in ("normality", "drift")}
NORMALITY_KEYS: dict[str, tuple[Any, str]] = NORMALITY.table()


@dataclass(frozen=True)
class NormalityRule:
    """The normality gate of a rule."""

    test: str = NORMALITY.default("test", str)
    alpha: float = NORMALITY.default("alpha", float)
    on_fail: str = NORMALITY.default("on_fail", str)
    on_unassessed: str = NORMALITY.default("on_unassessed", str)
    enabled: bool = True


@dataclass(frozen=True)
class DriftRule:
    """The drift watch of a rule (``[drift]``): CUSUM (k, h) or EWMA (lambda, L) over the lots' statistics."""

    method: str = DRIFT.default("method", str)
    k: float = DRIFT.default("k", float)
    h: float = DRIFT.default("h", float)
    lam: float = DRIFT.default("lambda", float)
    L: float = DRIFT.default("L", float)
    heads: bool = DRIFT.default("heads", bool)

    def values(self) -> dict[str, Any]:
        """The table's keys as written in a rule file (``lambda`` for ``lam``)."""
        return {"method": self.method, "k": self.k, "h": self.h, "lambda": self.lam, "L": self.L,
                "heads": self.heads}


@dataclass(frozen=True)
class Rule:
    """How the lots of some products are judged. Build with ``Rule.from_toml`` or ``Rule.adhoc``."""

    name: str
    target: float
    unit: str
    products: tuple[str, ...] = RULE.default("products", tuple)
    alternative: str = RULE.default("alternative", str)
    alpha: float = RULE.default("alpha", float)
    release: str = RULE.default("release", str)
    margin: float | None = None
    min_n: int = RULE.default("min_n", int)
    known_sd: float | None = None
    shift_of_interest: float | None = None
    target_power: float = RULE.default("target_power", float)
    idle_minutes: float = RULE.default("idle_minutes", float)
    nominal: float | None = None
    inspection: str = RULE.default("inspection", str)
    batch_size: int | None = None
    sampling_plan: str = RULE.default("sampling_plan", str)
    t1_share: float = RULE.default("t1_share", float)
    description: str = RULE.default("description", str)
    cost_per_unit: float | None = None
    currency: str | None = None
    normality: NormalityRule = field(default_factory=NormalityRule)
    drift: DriftRule | None = None
    source: str | None = None
    content_hash: str = ""
    text: str = field(default="", compare=False, repr=False)   # the rule file's full text as read

    def values(self) -> dict[str, Any]:
        """The rule's validated values as plain JSON-able data (key -> value; ``normality`` a nested table);
        what a ``rule-changed`` alert compares. Source, hash and text are not values."""
        out: dict[str, Any] = {}
        for f in dataclasses.fields(self):
            if f.name in ("source", "content_hash", "text"):
                continue
            v = getattr(self, f.name)
            if f.name == "normality":
                v = {k: w for k, w in dataclasses.asdict(v).items() if k != "enabled"}
            elif f.name == "drift":
                v = None if v is None else v.values()
            elif isinstance(v, tuple):
                v = list(v)
            out[f.name] = v
        return out

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
        table, digest, text = read_toml_text(path, what="rule file", error=RuleError)
        return dataclasses.replace(_parse_rule(table, str(Path(path)), digest), text=text)


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


def _quantity_keys(table: Mapping[str, Any], values: dict[str, Any], source: str) -> None:
    """The average-quantity keys (nominal, inspection, batch_size, sampling_plan, t1_share) checked together;
    each value alone was already checked against its declaration."""
    from monitor.quantity import TABLE_MAX, TABLE_MIN, nominal_in_table_unit

    if "nominal" not in table:
        for key in ("inspection", "batch_size", "sampling_plan", "t1_share"):
            if key in table:
                raise _fail(source, key, f"{key} is set but the rule has no nominal",
                            hint="set nominal (the quantity on the label) to use the average-quantity screen")
        return
    v, unit = values["nominal"], values["unit"]
    q, base = nominal_in_table_unit(v, unit)
    if not (TABLE_MIN <= q <= TABLE_MAX):
        raise _fail(source, "nominal", f"nominal = {v:g} {unit} is {q.normalize():f} {base} — outside the published "
                    "TNE table (5 g/mL to 25 kg/L)", hint="no tolerable negative error is published for it; "
                    "remove nominal for this rule")
    if values["inspection"] == "sample":
        if "batch_size" not in table:
            raise _fail(source, "batch_size", 'missing batch_size — inspection = "sample" needs the packs in the batch',
                        hint=RULE["batch_size"].doc)
        if values["sampling_plan"] == "destructive" and values["batch_size"] < 100:
            raise _fail(source, "sampling_plan", f'sampling_plan = "destructive" with batch_size = '
                        f'{values["batch_size"]} — destructive testing is for batches of 100 or more '
                        "(Directive 76/211/EEC Annex II 2.2.2)")
        if "t1_share" in table:
            raise _fail(source, "t1_share", 't1_share is for inspection = "full"',
                        hint='under "sample" the published plan for batch_size sets the packs allowed below T1')
    else:
        for key in ("batch_size", "sampling_plan"):
            if key in table:
                raise _fail(source, key, f'{key} is for inspection = "sample" (this rule inspects every pack)',
                            hint='set inspection = "sample" if the export is a sample of a batch')


def _release_keys(table: Mapping[str, Any], values: dict[str, Any], source: str) -> None:
    """release and margin checked together."""
    if values["release"] == "equivalence" and "margin" not in table:
        raise _fail(source, "margin", 'missing margin — release = "equivalence" needs the half-width of the '
                    "range around target", hint=RULE["margin"].doc)
    if values["release"] != "equivalence" and "margin" in table:
        raise _fail(source, "margin", 'margin is set but release is not "equivalence"',
                    hint='set release = "equivalence" to pass lots only when shown within target ± margin, '
                    "or remove margin")


def _parse_rule(table: Mapping[str, Any], source: str, content_hash: str) -> Rule:
    values = read(RULE, table, source=source, error=RuleError)
    normality = read(NORMALITY, values.pop("normality"), source=source, error=RuleError)
    drift_table = values.pop("drift")
    drift = None
    if drift_table is not None:
        d = read(DRIFT, drift_table, source=source, error=RuleError)
        drift = DriftRule(method=d["method"], k=d["k"], h=d["h"], lam=d["lambda"], L=d["L"], heads=d["heads"])
    _quantity_keys(table, values, source)
    _release_keys(table, values, source)
    if "currency" in table and "cost_per_unit" not in table:
        raise _fail(source, "currency", "currency is set but the rule has no cost_per_unit",
                    hint="set cost_per_unit (the cost of one rule unit of product) or remove currency")
    return Rule(normality=NormalityRule(**normality), drift=drift, source=source, content_hash=content_hash,
                **values)
