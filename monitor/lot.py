"""Value objects that flow through the core: a lot's data in, a verdict out.

``LotData`` is what the reader (``lotwarden check``) or the state store (daemon) hands the statistics
engine; ``Verdict`` is what ``monitor.engine.evaluate`` returns. Both are frozen. ``Verdict.to_json()``
is the one JSON shape used by ``check --format json``, the alert log and alert templates.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np

VERDICTS = ("pass", "hold", "review")
# Why a row that belongs to a lot carries no usable value (JSON ``excluded_by`` always has all four keys).
EXCLUSION_REASONS = ("blank", "not_a_number", "not_finite", "dropped_value")


def excluded_counts(given: Mapping[str, int] | None, total: int) -> dict[str, int]:
    """All four exclusion reasons with their counts; non-finite values no reason accounts for are
    ``not_finite`` (so the counts add up to ``total``, the lot's non-finite values)."""
    out = {r: int((given or {}).get(r, 0)) for r in EXCLUSION_REASONS}
    rest = total - sum(out.values())
    if rest > 0:
        out["not_finite"] += rest
    return out


def no_rule_reason(product: str) -> str:
    """The reason of the `review` verdict of a lot whose product no rule names (``check`` and the daemon)."""
    return f"no rule matches product {product or '(none)'!r}; add a rule file naming it under `products`"


@dataclass(frozen=True)
class LotKey:
    """Identity of a lot: one lot code on one line for one product ("" where the export has no column)."""

    line: str
    product: str
    lot: str


@dataclass(frozen=True)
class LotSummary:
    """A lot known only by its summary statistics (weighers that export lot, n, mean, sd)."""

    n: int
    mean: float
    sd: float


@dataclass(frozen=True, eq=False)
class LotData:
    """One lot's measurements, already in the rule's unit, in arrival order.

    Exactly one of ``values`` (float64 array) and ``summary`` is set. ``heads`` (same length as
    ``values``, or None) names the filler head / valve of each value.

    A row of the lot that carried no usable value is a NaN in ``values`` (it keeps its place in arrival
    order); ``excluded_by`` counts those rows per reason in ``EXCLUSION_REASONS`` (NaNs it does not account
    for count as ``not_finite``). ``unit_assumed`` is True when the values carried no unit (no unit column,
    no profile ``unit``) and were taken to be in the judging rule's unit.
    """

    key: LotKey
    values: np.ndarray | None = None
    summary: LotSummary | None = None
    heads: tuple[str, ...] | None = None
    files: tuple[str, ...] = ()
    unit: str = "g"
    unit_assumed: bool = False
    excluded_by: Mapping[str, int] = field(default_factory=dict)
    runs: int | None = None

    def __post_init__(self) -> None:
        if (self.values is None) == (self.summary is None):
            raise ValueError("LotData needs exactly one of values and summary")
        if self.values is not None:
            arr = np.asarray(self.values, dtype=np.float64)
            arr.setflags(write=False)
            object.__setattr__(self, "values", arr)
            if self.heads is not None and len(self.heads) != arr.shape[0]:
                raise ValueError("heads must be as long as values")


@dataclass(frozen=True)
class NormalityResult:
    """Outcome of the normality gate. ``passed`` is None when it was not assessed (reason says why)."""

    test: str | None
    statistic: float | None
    p_value: float | None
    passed: bool | None
    note: str = ""

    def to_json(self) -> dict[str, Any]:
        return {"test": self.test, "statistic": _num(self.statistic), "p_value": _num(self.p_value),
                "passed": self.passed, "note": self.note}


@dataclass(frozen=True)
class HeadSummary:
    """Per filler head: n, mean, sd and the offset of its mean from target (which head drifted).

    ``p_value`` is the head's own one-sample test against target; ``p_holm`` the same p Holm-adjusted
    across the lot's heads that have one (the p that decides whether a head is named as drifting).
    """

    head: str
    n: int
    mean: float
    sd: float | None
    offset: float
    p_value: float | None = None
    p_holm: float | None = None

    def to_json(self) -> dict[str, Any]:
        return {"head": self.head, "n": self.n, "mean": _num(self.mean), "sd": _num(self.sd),
                "offset": _num(self.offset), "p_value": _num(self.p_value), "p_holm": _num(self.p_holm)}


@dataclass(frozen=True)
class HeadsTest:
    """Whether a lot's heads differ from each other: one-way ANOVA, or Kruskal–Wallis when normality failed.

    ``df_within`` is None for Kruskal–Wallis (its H is referred to chi-square with ``df_between`` df).
    """

    test: str                  # "anova" | "kruskal"
    statistic: float
    p_value: float
    df_between: int
    df_within: int | None
    note: str = ""

    def to_json(self) -> dict[str, Any]:
        return {"test": self.test, "statistic": _num(self.statistic), "p_value": _num(self.p_value),
                "df_between": self.df_between, "df_within": self.df_within, "note": self.note}


@dataclass(frozen=True)
class WilcoxonInfo:
    """How a Wilcoxon signed-rank test was computed: exact or normal approximation, zero differences."""

    method: str        # "exact" | "normal approximation"
    zeros: int         # differences from target of exactly zero, dropped before ranking
    n_used: int        # differences ranked (n - zeros)

    def to_json(self) -> dict[str, Any]:
        return {"method": self.method, "zeros": self.zeros, "n_used": self.n_used}


@dataclass(frozen=True)
class Verdict:
    """The engine's decision on one lot, with every number a reader needs to check it.

    ``verdict`` is "hold" (the mean is shown to have moved off target in the direction the rule
    tests), "pass" (no shift shown) or "review" (the test cannot be trusted here; ``reason`` says why).
    """

    key: LotKey
    rule: str
    rule_version: str
    n: int
    mean: float | None
    sd: float | None
    target: float
    unit: str
    alternative: str
    alpha: float
    test: str | None               # "t" | "z" | "wilcoxon" | None (no test ran)
    statistic: float | None
    df: float | None
    p_value: float | None
    critical_value: float | None
    se: float | None
    ci_low: float | None           # None = open end of a one-sided interval, or no interval
    ci_high: float | None
    effect_size: float | None      # (mean - target) / sd  (Cohen's d; with known_sd, / known_sd)
    normality: NormalityResult
    power: float | None            # power against the rule's shift_of_interest at this n; None without one
    n_for_power: int | None        # smallest n reaching the rule's target_power against that shift
    verdict: str
    reason: str
    excluded: int = 0              # rows of the lot without a usable value (NaN), left out
    heads: tuple[HeadSummary, ...] = ()
    files: tuple[str, ...] = ()
    average_quantity: Any = None   # monitor.quantity.AverageQuantityResult when the rule has a nominal
    unit_assumed: bool = False     # the values carried no unit and were taken to be in the rule's unit
    excluded_by: Mapping[str, int] = field(default_factory=lambda: excluded_counts(None, 0))
    wilcoxon: WilcoxonInfo | None = None   # set when test == "wilcoxon"
    runs: int | None = None        # separate runs of rows that made the lot (monitor.lotmodel); None: not counted
    giveaway: Any = None           # monitor.giveaway.Giveaway when the mean is known in the rule's unit
    equivalence: Any = None        # monitor.stats.equivalence.Equivalence with release = "equivalence"
    heads_test: HeadsTest | None = None    # heads compared with each other; None: no heads or nothing to test
    heads_test_note: str | None = None     # why heads_test is None for a lot that names heads; else None

    def to_json(self) -> dict[str, Any]:
        """The documented JSON object (``check --format json``, alert log, templates)."""
        return {
            "file": self.files[0] if self.files else None,
            "files": list(self.files),
            "line": self.key.line,
            "product": self.key.product,
            "lot": self.key.lot,
            "rule": self.rule,
            "rule_version": self.rule_version,
            "n": self.n,
            "mean": _num(self.mean),
            "sd": _num(self.sd),
            "target": _num(self.target),
            "unit": self.unit,
            "unit_assumed": self.unit_assumed,
            "alternative": self.alternative,
            "alpha": _num(self.alpha),
            "test": self.test,
            "statistic": _num(self.statistic),
            "df": _num(self.df),
            "p_value": _num(self.p_value),
            "critical_value": _num(self.critical_value),
            "se": _num(self.se),
            "ci_low": _num(self.ci_low),
            "ci_high": _num(self.ci_high),
            "effect_size": _num(self.effect_size),
            "normality": self.normality.to_json(),
            "power": _num(self.power),
            "n_for_power": self.n_for_power,
            "verdict": self.verdict,
            "reason": self.reason,
            "excluded": self.excluded,
            "excluded_by": excluded_counts(self.excluded_by, self.excluded),
            "wilcoxon": None if self.wilcoxon is None else self.wilcoxon.to_json(),
            "heads": [h.to_json() for h in self.heads],
            "heads_test": None if self.heads_test is None else self.heads_test.to_json(),
            "heads_test_note": self.heads_test_note,
            "equivalence": None if self.equivalence is None else self.equivalence.to_json(),
            "average_quantity": None if self.average_quantity is None else self.average_quantity.to_json(),
            "runs": self.runs,
            "giveaway": None if self.giveaway is None else self.giveaway.to_json(),
        }

    def with_runs(self, runs: int | None) -> Verdict:
        """This verdict with ``runs`` set: a shallow copy (a batch of lots cannot afford ``replace``'s
        re-validation per verdict), never a change to ``self``."""
        if runs == self.runs:
            return self
        new = object.__new__(Verdict)
        new.__dict__.update(self.__dict__, runs=runs)
        return new


def _num(x: float | None) -> float | None:
    """JSON-safe number: None for None/NaN; +-inf kept as None too (JSON has no infinities)."""
    if x is None:
        return None
    x = float(x)
    return x if math.isfinite(x) else None


def unjudged(lot: LotData, reason: str, *, rule_name: str = "", rule_version: str = "",
             target: float = math.nan, alternative: str = "", alpha: float = math.nan) -> Verdict:
    """A `review` verdict for a lot no test could be run on (no rule for its product, unusable units).

    Descriptive numbers (n, mean, sd) are still filled in so a person can look.
    """
    if lot.values is not None:
        from monitor.stats.moments import compute_moments

        finite = np.isfinite(lot.values)
        m = compute_moments(lot.values[finite])
        n, mean, sd = m.n, (m.mean if m.n else None), (m.sd if m.n > 1 else None)
        excluded = int(lot.values.shape[0] - finite.sum())
    else:
        assert lot.summary is not None
        n, mean, sd = lot.summary.n, lot.summary.mean, lot.summary.sd
        excluded = 0
    return Verdict(
        key=lot.key, rule=rule_name, rule_version=rule_version, n=n, mean=mean, sd=sd, target=target,
        unit=lot.unit, alternative=alternative, alpha=alpha, test=None, statistic=None, df=None,
        p_value=None, critical_value=None, se=None, ci_low=None, ci_high=None, effect_size=None,
        normality=NormalityResult(test=None, statistic=None, p_value=None, passed=None, note="not assessed"),
        power=None, n_for_power=None, verdict="review", reason=reason, files=lot.files,
        excluded=excluded, unit_assumed=lot.unit_assumed, excluded_by=excluded_counts(lot.excluded_by, excluded),
        runs=lot.runs,
    )
