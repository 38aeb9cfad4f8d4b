"""Average-quantity screen of a lot against its nominal quantity (the packers' rules of the average system).

Pure. The published texts it follows (section numbers beside each table below):

- the tolerable negative error (TNE) table of Council Directive 76/211/EEC Annex I 2.4 (5 g/mL to 10 kg/L),
  with percentages rounded up to the next 0.1 g or mL; beyond 10 kg the UK table (SI 2006/659, as published
  on gov.uk "Weights and measures: the law — packaged goods"; the same values in the New Zealand Weights and
  Measures Regulations 1999, Schedule 7A Table 2) up to 25 kg/L, and the screen names that source. The table
  is in g or mL: a nominal in kg, L, oz, fl oz or mg is converted to g or mL, looked up, and the TNE converted
  back into the rule's unit. Outside 5 g/mL–25 kg/L there is no published TNE here and the screen says so
  (review), it never extrapolates.
- T1 = Qn − TNE ("minimum acceptable contents", SI 2006/659 Sch. 2 ¶3.1), a pack strictly below it is
  defective (¶3.2); T2 = Qn − 2·TNE, no pack may be below it (Directive Annex I 1.3).
- ``inspection = "full"`` (every pack of the lot is in the export, as from a checkweigher): the packers' rules
  apply directly: mean ≥ Qn, packs below T1 at most floor(t1_share × n), none below T2.
- ``inspection = "sample"`` (the export holds a sample of a batch of ``batch_size`` packs): the reference test
  of SI 2006/659 Schedule 2 — single sampling plan (¶3.3–3.5), double sampling plan (¶3.7 ff., Directive
  Annex II 2.2.1), destructive plan (Directive Annex II 2.2.2; ¶2.4: not for batches under 100), the mean
  criterion x̄ ≥ Qn − t(0.995, n−1)·s/√n (¶4.1–4.6) over every pack of the sample (at least the 30 / 50 / 20
  packs of ¶4.5–4.6, so never more lenient than the published factor), and batches under 100 packs checked in
  full: at most 5 % defective (¶3.6), mean ≥ Qn (¶4.7). The plan's defectives are counted in its own sample,
  the first packs of the export in arrival order. A sample smaller than its plan needs is ``needs_review``
  with the plan's size named, never a pass.

Limits are decimal quantities and packs are compared at the export's printed resolution: each value is read as
the decimal its binary float stands for, rounded to 12 significant digits (this removes the noise of binary
floating point and of unit conversion; checkweighers print far fewer digits), and compared exactly
(Decimal) with the limits in g or mL. A 426.2 g pack is not below T2 = 426.2 g of a 453.6 g nominal.

lotwarden screens; net-quantity compliance is decided under local weights-and-measures law by the
competent authority.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from decimal import ROUND_CEILING, ROUND_FLOOR, Context, Decimal
from typing import TYPE_CHECKING, Any

import numpy as np
from scipy import special

from monitor.stats.wording import quantity_decimals
from monitor.units import UNITS, canonical_unit

if TYPE_CHECKING:
    from monitor.rulebook import Rule

__all__ = [
    "DIRECTIVE_MAX",
    "INSPECTIONS",
    "SAMPLING_PLANS",
    "T1_SHARE",
    "TABLE_MAX",
    "TABLE_MIN",
    "AverageQuantityResult",
    "Limits",
    "Plan",
    "allowed_below_t1",
    "limits",
    "mean_criterion_factor",
    "nominal_in_table_unit",
    "plan_for",
    "screen_average_quantity",
    "screen_lot",
    "tolerable_negative_error",
]

INSPECTIONS = ("full", "sample")
SAMPLING_PLANS = ("single", "double", "destructive")
T1_SHARE = 0.025                      # share below T1 under full inspection (default; see rulebook key doc)
TABLE_MIN = Decimal(5)                # g or mL: the TNE table starts here (Directive Annex I 2.4)
DIRECTIVE_MAX = Decimal(10000)        # g or mL: the Directive's table ends here
TABLE_MAX = Decimal(25000)            # g or mL: the UK table's scope ends here (gov.uk packaged goods page)

# (upper Qn bound inclusive, kind, amount): kind "pct" -> percent of Qn, "abs" -> g or mL.
# Directive 76/211/EEC Annex I 2.4; the bands meet at their edges, so the owner of an edge does not matter.
_TNE_TABLE = (
    (Decimal(50), "pct", Decimal(9)),
    (Decimal(100), "abs", Decimal("4.5")),
    (Decimal(200), "pct", Decimal("4.5")),
    (Decimal(300), "abs", Decimal(9)),
    (Decimal(500), "pct", Decimal(3)),
    (Decimal(1000), "abs", Decimal(15)),
    (DIRECTIVE_MAX, "pct", Decimal("1.5")),
    # UK table beyond the Directive (gov.uk packaged goods page; NZ regs 1999 Sch. 7A Table 2)
    (Decimal(15000), "abs", Decimal(150)),
    (TABLE_MAX, "pct", Decimal(1)),
)
_SOURCE_UK = "TNE above 10 kg/L from the UK table (SI 2006/659), not the EU Directive"

# Single sampling plans for non-destructive testing, SI 2006/659 Sch. 2 ¶3.3–3.5:
# (smallest batch, sample, accept, reject).
_SINGLE = ((3201, 125, 7, 8), (501, 80, 5, 6), (100, 50, 3, 4))
# Double sampling plans, SI 2006/659 Sch. 2 ¶3.7 ff. and Directive 76/211/EEC Annex II 2.2.1:
# (smallest batch, (first sample, accept, reject), (aggregate sample, accept, reject)).
_DOUBLE = ((3201, (80, 3, 7), (160, 8, 9)), (501, (50, 2, 5), (100, 6, 7)), (100, (30, 1, 3), (60, 4, 5)))
# Destructive testing, any batch of 100 or more: Directive 76/211/EEC Annex II 2.2.2 (SI 2006/659 Sch. 2 ¶2.4).
_DESTRUCTIVE = (20, 1, 2)
_SMALL_BATCH = 100                    # ¶2.8, ¶3.6, ¶4.7: batches under 100 are checked in full
_SMALL_SHARE = Decimal("0.05")        # ¶3.6: at most 5 % defective

_EXACT = Context(prec=50)
_PRINTED = Context(prec=12)           # significant digits a value is compared at (see module docstring)
_BAND = 1e-9                          # relative band around a limit inside which the comparison is exact


@dataclass(frozen=True)
class Limits:
    """Nominal, TNE, T1 and T2 of one product, in g or mL (``base``) and as floats in the rule's unit."""

    base_unit: str                    # "g" or "mL" (or "g or mL" when the rule has no unit)
    factor: Decimal                   # rule unit -> base unit
    nominal_base: Decimal
    tne_base: Decimal
    t1_base: Decimal
    t2_base: Decimal
    note: str                         # "" or the source of a TNE outside the Directive's table

    def in_rule_unit(self, v: Decimal) -> float:
        return float(_EXACT.divide(v, self.factor))

    @property
    def nominal(self) -> float:
        return self.in_rule_unit(self.nominal_base)

    @property
    def tne(self) -> float:
        return self.in_rule_unit(self.tne_base)

    @property
    def t1(self) -> float:
        return self.in_rule_unit(self.t1_base)

    @property
    def t2(self) -> float:
        return self.in_rule_unit(self.t2_base)


@dataclass(frozen=True)
class Plan:
    """The sampling plan (or the decisive stage of a double plan) a sample was judged by."""

    batch_size: int
    sample_size: int
    accept: int
    reject: int
    kind: str = "single plan"         # how the plan is named in the reason

    def to_json(self) -> dict[str, Any]:
        return {"batch_size": self.batch_size, "sample_size": self.sample_size, "accept": self.accept,
                "reject": self.reject}


@dataclass(frozen=True)
class AverageQuantityResult:
    """Outcome of the average-quantity screen of one lot (quantities in the rule's unit)."""

    nominal: float
    tne: float | None
    t1: float | None
    t2: float | None
    inspection: str
    n: int
    mean: float
    mean_limit: float | None          # full / batch < 100: Qn; sample: Qn − t(0.995, n−1)·s/√n
    mean_ok: bool | None
    below_t1: int                     # packs strictly below T1 (in the plan's sample under sample inspection)
    below_t1_allowed: int | None
    below_t2: int                     # packs strictly below T2 (all packs)
    plan: Plan | None
    passed: bool | None               # None: not decided (see needs_review)
    reason: str
    needs_review: bool = False        # the screen could not decide (sample too small, out of scope): review

    def to_json(self) -> dict[str, Any]:
        return {"nominal": self.nominal, "tne": self.tne, "t1": self.t1, "t2": self.t2,
                "inspection": self.inspection, "n": self.n, "mean": _num(self.mean),
                "mean_limit": _num(self.mean_limit), "mean_ok": self.mean_ok, "below_t1": self.below_t1,
                "below_t1_allowed": self.below_t1_allowed, "below_t2": self.below_t2,
                "plan": None if self.plan is None else self.plan.to_json(), "passed": self.passed,
                "reason": self.reason}


# --------------------------------------------------------------------------------------------- TNE
def _unit_factor(unit: str) -> tuple[str, Decimal]:
    """(base unit, exact factor rule unit -> g or mL); a rule without a unit is taken as g or mL."""
    if not unit:
        return "g or mL", Decimal(1)
    canon = canonical_unit(unit)
    if canon is None:
        raise ValueError(f"unknown unit {unit!r}")
    kind, factor = UNITS[canon]
    return ("g" if kind == "mass" else "mL"), Decimal(repr(factor))


def _printed(v: float) -> Decimal:
    return _PRINTED.create_decimal_from_float(float(v))


def nominal_in_table_unit(nominal: float, unit: str) -> tuple[Decimal, str]:
    """The nominal converted exactly into g or mL (the TNE table's units), with that unit's name."""
    base, factor = _unit_factor(unit)
    return _EXACT.multiply(_printed(nominal), factor), base


def _tne_base(q: Decimal) -> tuple[Decimal, str]:
    """TNE in g or mL for a nominal ``q`` in g or mL, and the note naming a non-Directive source."""
    if not (TABLE_MIN <= q <= TABLE_MAX):
        raise ValueError(f"outside the published TNE table (5 g/mL to 25 kg/L): {q.normalize():f} g or mL")
    _upper, kind, amount = next((row for row in _TNE_TABLE if q <= row[0]), _TNE_TABLE[-1])
    note = _SOURCE_UK if q > DIRECTIVE_MAX else ""
    if kind == "abs":
        return amount, note
    # percentages are rounded up to the next 0.1 g or mL (gov.uk packaged goods page; FPackV §9(3))
    return _EXACT.multiply(q, amount / 100).quantize(Decimal("0.1"), rounding=ROUND_CEILING), note


def limits(nominal: float, unit: str = "g") -> Limits:
    """Nominal, TNE, T1 and T2 for ``nominal`` in ``unit``; ValueError outside the table's scope."""
    base, factor = _unit_factor(unit)
    q = _EXACT.multiply(_printed(nominal), factor)
    tne, note = _tne_base(q)
    return Limits(base, factor, q, tne, q - tne, q - 2 * tne, note)


def tolerable_negative_error(nominal: float, unit: str = "g") -> float:
    """TNE for a nominal quantity ``nominal`` given in ``unit`` (the result in the same unit).

    Examples
    --------
    >>> tolerable_negative_error(250), tolerable_negative_error(125), tolerable_negative_error(5, "L")
    (9.0, 5.7, 0.075)
    """
    return limits(nominal, unit).tne


# --------------------------------------------------------------------------------------------- plans
def allowed_below_t1(n: int, t1_share: float = T1_SHARE) -> int:
    """Packs of a fully inspected lot of ``n`` that may be below T1: floor(t1_share × n), exactly."""
    return int((Decimal(repr(float(t1_share))) * n).to_integral_value(rounding=ROUND_FLOOR))


def plan_for(batch_size: int, kind: str = "single") -> tuple[Plan, ...]:
    """The published plan(s) for a batch: one Plan, or two (first, aggregate) for the double plan.

    Batches under 100 packs are checked in full (SI 2006/659 Sch. 2 ¶2.8) with at most 5 % defective (¶3.6);
    the destructive plan is for batches of 100 or more only (Directive Annex II 2.2.2).
    """
    if batch_size < 1:
        raise ValueError("batch_size must be at least 1")
    if batch_size < _SMALL_BATCH:
        if kind == "destructive":
            raise ValueError("destructive testing is for batches of 100 or more")
        accept = int((_SMALL_SHARE * batch_size).to_integral_value(rounding=ROUND_FLOOR))
        return (Plan(batch_size, batch_size, accept, accept + 1, "batch under 100 checked in full"),)
    if kind == "destructive":
        size, acc, rej = _DESTRUCTIVE
        return (Plan(batch_size, size, acc, rej, "destructive plan"),)
    if kind == "double":
        for lo, first, both in _DOUBLE:
            if batch_size >= lo:
                return (Plan(batch_size, *first, "double plan, first sample"),
                        Plan(batch_size, *both, "double plan, both samples"))
    for lo, size, acc, rej in _SINGLE:
        if batch_size >= lo:
            return (Plan(batch_size, size, acc, rej, "single plan"),)
    raise AssertionError("unreachable")  # pragma: no cover


def mean_criterion_factor(n: int) -> float:
    """t(0.995, n−1)/√n: the mean limit is Qn minus this times s (SI 2006/659 Sch. 2 ¶4.1–4.2)."""
    return float(special.stdtrit(n - 1, 0.995)) / math.sqrt(n)


# --------------------------------------------------------------------------------------------- exact counts
def _count_below(v: np.ndarray, limit: Decimal, factor: Decimal) -> int:
    """Values (rule unit) whose printed decimal times ``factor`` is strictly below ``limit`` (g or mL)."""
    lf = float(limit)
    vb = v * float(factor)
    tol = _BAND * max(abs(lf), 1.0)
    clear = int(np.count_nonzero(vb < lf - tol))
    near = v[np.abs(vb - lf) <= tol]
    return clear + sum(1 for x in near.tolist() if _EXACT.multiply(_printed(x), factor) < limit)


def _mean_at_least(v: np.ndarray, mean: float, nominal: float) -> tuple[bool, float]:
    """(mean(v) ≥ nominal, the mean): exact at the printed resolution when the two are close."""
    if abs(mean - nominal) > _BAND * max(abs(nominal), 1.0):
        return mean >= nominal, mean
    total = sum((_printed(x) for x in v.tolist()), Decimal(0))
    ok = _EXACT.compare(total, _EXACT.multiply(_printed(nominal), Decimal(v.shape[0]))) >= 0
    return bool(ok), float(_EXACT.divide(total, Decimal(v.shape[0])))


# --------------------------------------------------------------------------------------------- the screen
def screen_average_quantity(values: np.ndarray, nominal: float, unit: str = "g", *, inspection: str = "full",
                            batch_size: int | None = None, t1_share: float = T1_SHARE,
                            sampling_plan: str = "single") -> AverageQuantityResult:
    """Screen one lot's net quantities (in ``unit``, the nominal's unit) by the packers' rules or the
    reference test; see the module docstring."""
    v = np.asarray(values, dtype=np.float64)
    v = v[np.isfinite(v)]
    n = int(v.shape[0])
    mean = float(np.mean(v)) if n else math.nan
    u = f" {unit}" if unit else ""
    try:
        lim = limits(nominal, unit)
    except ValueError as exc:
        return _undecided(nominal, inspection, n, mean,
                          f"average-quantity screen not applied: nominal {_q(nominal)}{u} is {exc}")
    head = f"nominal {_q(lim.nominal)}{u}, TNE {_q(lim.tne)}{u}"
    if lim.note:
        head += f" ({lim.note})"
    if n == 0:
        return _undecided(nominal, inspection, 0, mean, f"average-quantity screen needs review: {head}; no values",
                          lim)
    below_t2 = _count_below(v, lim.t2_base, lim.factor)
    if inspection == "full":
        return _full(v, mean, lim, head, u, below_t2, t1_share)
    if inspection != "sample":
        return _undecided(nominal, inspection, n, mean,
                          f"average-quantity screen not applied: inspection {inspection!r} is not one of "
                          f"{', '.join(INSPECTIONS)}", lim)
    return _sample(v, mean, lim, head, u, below_t2, batch_size, sampling_plan)


def _full(v: np.ndarray, mean: float, lim: Limits, head: str, u: str, below_t2: int,
          t1_share: float) -> AverageQuantityResult:
    """Every pack of the lot was weighed: mean ≥ Qn, ≤ floor(t1_share·n) below T1, none below T2."""
    n = int(v.shape[0])
    below_t1 = _count_below(v, lim.t1_base, lim.factor)
    allowed = allowed_below_t1(n, t1_share)
    mean_ok, mean = _mean_at_least(v, mean, lim.nominal)
    passed = mean_ok and below_t1 <= allowed and below_t2 == 0
    dec = _decimals(v, mean, lim.nominal)
    reason = (f"average-quantity screen {'met' if passed else 'not met'} (full inspection): {head}; mean "
              f"{mean:.{dec}f}{u} {'≥' if mean_ok else '<'} nominal {_q(lim.nominal)}; {below_t1} of {n} below T1 "
              f"{_q(lim.t1)}{u} ({allowed} allowed); {below_t2} below T2 {_q(lim.t2)}{u}")
    return AverageQuantityResult(lim.nominal, lim.tne, lim.t1, lim.t2, "full", n, mean, lim.nominal, mean_ok,
                                 below_t1, allowed, below_t2, None, passed, reason)


def _sample(v: np.ndarray, mean: float, lim: Limits, head: str, u: str, below_t2: int, batch_size: int | None,
            sampling_plan: str) -> AverageQuantityResult:
    """The export is a sample of a batch: the published plan for the batch size, then the mean criterion."""
    n = int(v.shape[0])
    mode = f"sample of a batch of {batch_size}" if batch_size is not None else "sample"

    def review(why: str, plan: Plan | None = None) -> AverageQuantityResult:
        return AverageQuantityResult(lim.nominal, lim.tne, lim.t1, lim.t2, "sample", n, mean, None, None,
                                     _count_below(v, lim.t1_base, lim.factor), None, below_t2, plan, None,
                                     f"average-quantity screen needs review ({mode}): {head}; {why}",
                                     needs_review=True)

    if batch_size is None or batch_size < 1:
        return review("inspection = \"sample\" needs batch_size (the packs in the batch)")
    if sampling_plan not in SAMPLING_PLANS:
        return review(f"sampling_plan {sampling_plan!r} is not one of {', '.join(SAMPLING_PLANS)}")
    try:
        plans = plan_for(batch_size, sampling_plan)
    except ValueError as exc:
        return review(str(exc))
    if n > batch_size:
        return review(f"the export holds {n} packs, more than the batch of {batch_size}")
    small = batch_size < _SMALL_BATCH
    first = plans[0]
    if n < first.sample_size:
        need = (f"a batch under 100 packs is checked in full (SI 2006/659 Sch. 2 ¶2.8): {n} of {batch_size} "
                f"packs in the export" if small else
                f"the {first.kind} for a batch of {batch_size} needs {first.sample_size} packs; the export "
                f"holds {n}")
        return review(need, first)
    plan = first
    below_t1 = _count_below(v[:first.sample_size], lim.t1_base, lim.factor)
    if len(plans) == 2 and first.accept < below_t1 < first.reject:
        plan = plans[1]
        if n < plan.sample_size:
            return review(f"{below_t1} of the first {first.sample_size} packs below T1 {_q(lim.t1)}{u}: the double "
                          f"plan needs a second sample, {plan.sample_size} packs in all; the export holds {n}",
                          plan)
        below_t1 = _count_below(v[:plan.sample_size], lim.t1_base, lim.factor)
    t1_ok = below_t1 <= plan.accept
    if small:
        mean_limit = lim.nominal                              # ¶4.7: the mean of all packs ≥ Qn
        mean_ok, mean = _mean_at_least(v, mean, lim.nominal)
        dec = _decimals(v, mean, mean_limit)
        crit = f"mean {mean:.{dec}f}{u} {'≥' if mean_ok else '<'} nominal {_q(lim.nominal)}"
    else:
        s = float(np.std(v, ddof=1))
        mean_limit = lim.nominal - mean_criterion_factor(n) * s   # ¶4.1–4.2 over every pack of the sample
        mean_ok = bool(mean >= mean_limit)
        dec = _decimals(v, mean, mean_limit)
        crit = (f"mean {mean:.{dec}f}{u} {'≥' if mean_ok else '<'} limit {mean_limit:.{dec}f} "
                f"(Qn − t(0.995, {n - 1})·s/√{n})")
    passed = mean_ok and t1_ok and below_t2 == 0
    used = plan.sample_size
    of = f"{below_t1} of {used}" + (f" (first {used} of {n} packs)" if used < n else "")
    reason = (f"average-quantity screen {'met' if passed else 'not met'} ({mode}, {plan.kind}): {head}; "
              f"{crit}; {of} below T1 {_q(lim.t1)}{u} (accept ≤ {plan.accept}, reject ≥ {plan.reject}); "
              f"{below_t2} below T2 {_q(lim.t2)}{u}")
    return AverageQuantityResult(lim.nominal, lim.tne, lim.t1, lim.t2, "sample", n, mean, mean_limit, mean_ok,
                                 below_t1, plan.accept, below_t2, plan, passed, reason)


def _undecided(nominal: float, inspection: str, n: int, mean: float, reason: str,
               lim: Limits | None = None) -> AverageQuantityResult:
    return AverageQuantityResult(nominal, None if lim is None else lim.tne, None if lim is None else lim.t1,
                                 None if lim is None else lim.t2, inspection, n, mean, None, None, 0, None, 0, None,
                                 None, reason, needs_review=True)


def _q(x: float) -> str:
    """A set quantity (nominal, TNE, T1, T2) without trailing zeros, at most 6 significant digits."""
    return f"{x:.6g}"


def _decimals(v: np.ndarray, mean: float, limit: float) -> int:
    """Decimals to show a mean with: one digit finer than its spread (as the verdict shows it), and enough
    that a mean on the other side of its limit never prints equal to it."""
    sd = float(np.std(v, ddof=1)) if v.shape[0] >= 2 else 0.0
    dec = max(1, quantity_decimals(sd if sd > _BAND * abs(mean) else None))   # no spread: 2 decimals
    while dec < 10 and mean != limit and round(mean, dec) == round(limit, dec):
        dec += 1
    return dec


def _num(x: float | None) -> float | None:
    return None if x is None or not math.isfinite(x) else float(x)


def screen_lot(values: np.ndarray, rule: Rule) -> AverageQuantityResult:
    """The average-quantity screen of one lot under ``rule`` (which has a ``nominal``); values in the rule's
    unit, non-finite ones already left out. ``reason`` is the one-line summary shown with every verdict;
    ``needs_review`` says the screen could not decide (the lot goes to review, never passes on it)."""
    assert rule.nominal is not None
    return screen_average_quantity(values, rule.nominal, rule.unit, inspection=rule.inspection,
                                   batch_size=rule.batch_size, t1_share=rule.t1_share,
                                   sampling_plan=rule.sampling_plan)
