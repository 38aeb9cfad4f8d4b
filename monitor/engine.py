"""Applies a rule to a lot: gates (units, min n, spread, normality), the location test, interval, power -> Verdict.

Pure: no I/O, no clock, no logging. ``evaluate`` judges one lot; ``evaluate_many`` judges many lots of one
rule at once: moments are numpy segment reductions over the lots' values concatenated end to end,
Shapiro–Wilk runs on one matrix per lot size, t / z tests and power are scipy functions on arrays.
``evaluate`` is ``evaluate_many`` on a one-lot batch, and every per-lot number depends only on that lot's
values, so a lot gets the same Verdict alone or in any batch.

Gates, in order (each sends the lot to "review" with a plain reason, and no test verdict is given):
rows without a usable value (NaN or ±inf) are left out and counted, per reason (``LotData.excluded_by``);
an unusable summary; a unit mix-up; n < 2; n < ``rule.min_n``; a mean or sd that overflows; no spread (all
values equal, or a spread at the floating-point resolution of the mean; t rules only); then the normality
gate.

Unit mix-up: a lot whose mean is off its target by about the factor of one unit conversion (within 5 %)
was very likely exported in another unit than the rule's (kg values under a g rule give a mean near
target/1000). Candidate units are mg, g, kg, oz, lb (mass) and mL, L, fl oz (volume), mass <-> volume at a
density of 1 g/mL; factors inside [0.5, 2] (g vs mL, oz vs fl oz) are left out, as they cannot be told from
a real shift; a unit of the rule's kind wins a tie (under a mL rule a mean near target/1000 looks like L).
The gate comes right after the mean is known and before the count gates: a 3-unit lot in kg under a g rule
is first of all a unit problem (more units will not fix it). No test and no average-quantity screen run on
such a lot (its values are not in the rule's unit). The gate needs a positive target and mean.

The no-spread gate is for the t-test only (its statistic divides by the sample sd): a known-sd (z) rule
judges a lot of identical values, whose normality is then not assessed (``normality.on_unassessed``).
Normality (when enabled): Shapiro–Wilk for 3 <= n <= 5000. Above 5000 it is not assessed, by choice: Royston's
p-value approximation is not valid there, and by the central limit theorem the t-test on the mean of more
than 5000 units is robust to the non-normality fillers produce, so the lot proceeds to the t-test with a
note. Lots whose normality cannot be assessed (summaries, n = 2, no spread) follow
``normality.on_unassessed``. A rule with a ``nominal`` also gets the average-quantity screen
(monitor.quantity); a failed screen holds the lot. When a Shapiro–Wilk failure sends a lot to the Wilcoxon
signed-rank test, the lot is judged on its pseudo-median (a test of location, monitor.stats.wilcoxon).

A lot whose values carried no unit (``LotData.unit_assumed``) says so in its reason: the values were taken
to be in the rule's unit.

lotwarden screens lots; net-quantity compliance is decided under local weights-and-measures law by the
competent authority (``SCREENING_NOTE``).
"""

from __future__ import annotations

import itertools
import math
from collections.abc import Sequence
from dataclasses import dataclass
from functools import lru_cache
from typing import Any

import numpy as np

from monitor.giveaway import giveaway_of
from monitor.lot import (
    HeadsTest,
    HeadSummary,
    LotData,
    NormalityResult,
    Verdict,
    WilcoxonInfo,
    excluded_counts,
)
from monitor.rulebook import Rule
from monitor.stats.equivalence import Equivalence, n_to_show, not_shown_reason, tost_t, tost_z
from monitor.stats.heads import anova_segments, holm_segments, kruskal_wallis
from monitor.stats.location import t_test_arrays, z_test_arrays
from monitor.stats.moments import segment_moments
from monitor.stats.normality import MAX_N as SW_MAX_N
from monitor.stats.normality import MIN_N as SW_MIN_N
from monitor.stats.normality import shapiro_wilk_rows
from monitor.stats.power import n_for_power, power
from monitor.stats.wilcoxon import signed_differences, wilcoxon_test
from monitor.stats.wording import (
    format_excluded,
    format_p,
    format_quantity,
    format_statistic,
    plural,
    quantity_decimals,
)
from monitor.units import UNITS, canonical_unit

__all__ = ["SCREENING_NOTE", "evaluate", "evaluate_many"]

SCREENING_NOTE = ("lotwarden screens lots; net-quantity compliance is decided under local weights-and-measures "
                  "law by the competent authority.")
NOTE_LARGE_N = "not assessed: n > 5000; the t-test on the mean relies on the central limit theorem"
_RESOLUTION_ULPS = 8.0     # an sd below this many ulps of the mean is rounding noise, not spread

# gate codes
_OK, _N_LT2, _MIN_N, _FLAT, _BAD, _UNIT = 0, 1, 2, 3, 4, 5

# Units a mix-up may have given the values: (kind, factor to g or mL). 1 lb = 0.45359237 kg exactly
# (NIST SP 811, appendix B); the rest as monitor.units. Mass <-> volume at 1 g/mL.
_MIXUP_UNITS: dict[str, tuple[str, float]] = {**UNITS, "lb": ("mass", 453.59237)}
_MIXUP_TOLERANCE = 0.05            # |mean·factor/target − 1| within 5 %
_MIXUP_EXCLUDED = (0.5, 2.0)       # factors this close to 1 cannot be told from a real shift
_NO_EXCLUSIONS = excluded_counts(None, 0)


def evaluate(lot: LotData, rule: Rule) -> Verdict:
    """Judge one lot against ``rule``: "hold", "pass" or "review", with every number behind it."""
    return evaluate_many([lot], rule)[0]


def evaluate_many(lots: Sequence[LotData], rule: Rule) -> list[Verdict]:
    """Judge many lots against one rule at once; the same Verdicts as ``evaluate`` lot by lot."""
    lots = list(lots)
    if not lots:
        return []
    k = len(lots)
    has_values = np.array([lot.values is not None for lot in lots])
    raw_len = np.array([lot.values.shape[0] if lot.values is not None else 0 for lot in lots], dtype=np.int64)
    raw = np.concatenate([lot.values for lot in lots if lot.values is not None] or [np.empty(0)])
    finite = np.isfinite(raw)
    if finite.all():
        x, n = raw, raw_len.copy()
    else:
        x = raw[finite]
        n = np.bincount(np.repeat(np.arange(k), raw_len)[finite], minlength=k).astype(np.int64)
    excluded = raw_len - n
    _, mean, var = segment_moments(x, n)
    starts = np.cumsum(n) - n                                    # lot i's finite values: x[starts[i]:+n[i]]
    lo = np.full(k, np.nan)
    hi = np.full(k, np.nan)
    nonempty = n > 0
    if nonempty.any():
        lo[nonempty] = np.minimum.reduceat(x, starts[nonempty])
        hi[nonempty] = np.maximum.reduceat(x, starts[nonempty])

    summary_ok = np.ones(k, dtype=bool)
    for i in np.flatnonzero(~has_values).tolist():
        s = lots[i].summary
        assert s is not None
        whole = isinstance(s.n, (int, np.integer)) or (isinstance(s.n, float) and s.n.is_integer())
        # a mean is needed from n = 1 on, an sd from n = 2 on (a lone unit's sd may be NaN)
        good = bool(whole and s.n >= 0 and (s.n < 1 or np.isfinite(s.mean))
                    and (s.n < 2 or (np.isfinite(s.sd) and s.sd >= 0)))
        summary_ok[i] = good
        n[i] = int(s.n) if good else 0
        mean[i] = s.mean if good and s.n >= 1 else np.nan
        with np.errstate(all="ignore"):                          # an absurd sd overflows to inf: gate _BAD
            var[i] = np.float64(s.sd) ** 2 if good and s.n >= 2 else np.nan

    with np.errstate(all="ignore"):
        sd = np.sqrt(var)
        flat = (np.where(has_values, hi == lo, sd == 0) | (sd <= _RESOLUTION_ULPS * np.spacing(np.abs(mean)))) \
            & (n >= 2)
    mixup = _unit_mixup(mean, n, rule.target, [lot.unit for lot in lots])
    gate = np.full(k, _OK)
    if rule.known_sd is None:                                   # the z-test needs no sample spread
        gate[flat] = _FLAT
    gate[(n >= 2) & ~(np.isfinite(mean) & np.isfinite(var))] = _BAD
    gate[n < rule.min_n] = _MIN_N
    gate[n < 2] = _N_LT2
    gate[mixup >= 0] = _UNIT
    gate[~summary_ok] = _BAD
    ok = gate == _OK

    sw_w, sw_p = _shapiro_by_size(x, starts, n, ok & has_values & ~flat & rule.normality.enabled)
    sw_failed = ok & (sw_p < rule.normality.alpha)

    tested = ok.copy()
    if rule.normality.enabled and rule.normality.on_unassessed == "review":
        tested &= ~(~has_values | (n < SW_MIN_N) | flat)
    if rule.normality.enabled and rule.normality.on_fail == "review":
        tested &= ~sw_failed
    use_wilcoxon = tested & sw_failed & (rule.normality.on_fail == "wilcoxon") & has_values
    parametric = tested & ~use_wilcoxon

    if rule.known_sd is not None:
        res = z_test_arrays(n, mean, rule.known_sd, rule.target, rule.alternative, rule.alpha)
    else:
        res = t_test_arrays(n, mean, var, rule.target, rule.alternative, rule.alpha)
    pw, nfp = _power(n, sd, rule, (gate == _OK) | (gate == _MIN_N))

    cols = {key: np.asarray(v).tolist() for key, v in res.items()}
    ctx = _Columns(n=n.tolist(), mean=mean.tolist(), sd=sd.tolist(), excluded=excluded.tolist(),
                   gate=gate.tolist(), sw_w=sw_w.tolist(), sw_p=sw_p.tolist(), power=pw.tolist(),
                   nfp=nfp.tolist(), test=cols, flat=flat.tolist(), mixup=mixup.tolist())
    heads = _head_breakdown(lots, raw_len, rule, sw_failed)
    out: list[Verdict] = []
    for i, lot in enumerate(lots):
        # a unit mix-up's values are not in the rule's unit: nothing is computed from them (no screen either)
        usable = lot.values is not None and gate[i] != _UNIT
        values = x[starts[i]:starts[i] + n[i]] if usable else None
        out.append(_verdict(lot, rule, i, ctx, values, bool(parametric[i]), bool(use_wilcoxon[i]),
                            heads.get(i, _NO_HEADS)))
    return out


@dataclass(frozen=True)
class _Columns:
    """Per-lot numbers of a batch as Python lists (fast scalar access while building Verdicts)."""

    n: list[int]
    mean: list[float]
    sd: list[float]
    excluded: list[int]
    gate: list[int]
    sw_w: list[float]
    sw_p: list[float]
    power: list[float]
    nfp: list[int]
    test: dict[str, list[float]]
    flat: list[bool]
    mixup: list[int]


@lru_cache(maxsize=32)
def _mixup_candidates(unit: str) -> tuple[tuple[str, float], ...]:
    """(unit, factor into ``unit``) a mix-up could stem from, units of ``unit``'s own kind first."""
    canon = canonical_unit(unit) if unit else None
    if canon is None:
        return ()
    kind, base = _MIXUP_UNITS[canon]
    out = [(name, f / base, k == kind) for name, (k, f) in _MIXUP_UNITS.items()
           if not _MIXUP_EXCLUDED[0] <= f / base <= _MIXUP_EXCLUDED[1]]
    out.sort(key=lambda c: not c[2])                             # stable: own kind first
    return tuple((name, factor) for name, factor, _ in out)


def _unit_mixup(mean: np.ndarray, n: np.ndarray, target: float, units: list[str]) -> np.ndarray:
    """Per lot, the index into ``_mixup_candidates(unit)`` of the unit its mean looks like, or -1.

    The values look like unit u when mean · factor(u -> rule unit) is within 5 % of the target; of several,
    the closest wins (the first listed on a tie).
    """
    out = np.full(mean.shape[0], -1, dtype=np.int64)
    if not (np.isfinite(target) and target > 0):
        return out
    with np.errstate(all="ignore"):
        ratio = mean / target
    usable = (n >= 1) & np.isfinite(ratio) & (ratio > 0)
    if not usable.any():
        return out
    names = np.array(units, dtype=object)
    for unit in set(units):
        rows = usable & (names == unit) if len(set(units)) > 1 else usable
        best = np.full(mean.shape[0], _MIXUP_TOLERANCE)
        for j, (_, factor) in enumerate(_mixup_candidates(unit)):
            err = np.abs(ratio * factor - 1.0)
            hit = rows & (err <= _MIXUP_TOLERANCE) & ((out < 0) | (err < best))
            out[hit], best[hit] = j, err[hit]
    return out


def _shapiro_by_size(x: np.ndarray, starts: np.ndarray, n: np.ndarray,
                     wanted: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Shapiro–Wilk W and p for the wanted lots with 3 <= n <= 5000, one sorted matrix per lot size."""
    w = np.full(n.shape[0], np.nan)
    p = np.full(n.shape[0], np.nan)
    idx = np.flatnonzero(wanted & (n >= SW_MIN_N) & (n <= SW_MAX_N))
    if idx.size == 0:
        return w, p
    sizes = n[idx]
    order = np.argsort(sizes, kind="stable")
    idx, sizes = idx[order], sizes[order]
    bounds = np.flatnonzero(np.r_[True, sizes[1:] != sizes[:-1], True])
    for a, b in itertools.pairwise(bounds.tolist()):
        group = idx[a:b]
        size = int(sizes[a])
        rows = np.sort(x[starts[group][:, None] + np.arange(size)], axis=1)
        w[group], p[group] = shapiro_wilk_rows(rows)
    return w, p


def _power(n: np.ndarray, sd: np.ndarray, rule: Rule, wanted: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Power against ``rule.shift_of_interest`` at each lot's n, and the n reaching ``rule.target_power``."""
    pw = np.full(n.shape[0], np.nan)
    nfp = np.full(n.shape[0], -1, dtype=np.int64)
    if rule.shift_of_interest is None:
        return pw, nfp
    z = rule.known_sd is not None
    spread = np.full(n.shape[0], rule.known_sd) if z else sd
    idx = np.flatnonzero(wanted & (n >= 2) & np.isfinite(spread) & (spread > 0))
    if idx.size:
        pw[idx] = power(n[idx], rule.shift_of_interest, spread[idx], rule.alpha, rule.alternative, z)
        need = n_for_power(rule.shift_of_interest, spread[idx], rule.alpha, rule.target_power,
                           rule.alternative, z)
        nfp[idx] = need
    return pw, nfp


_HeadRows = tuple[tuple[HeadSummary, ...], HeadsTest | None, str | None]
_NO_HEADS: _HeadRows = ((), None, None)


def _head_breakdown(lots: list[LotData], raw_len: np.ndarray, rule: Rule,
                    sw_failed: np.ndarray) -> dict[int, _HeadRows]:
    """Per-head summaries and the heads test for every lot that names its heads, in segment passes.

    Groups are ordered by lot, then head name; inside a group values keep arrival order, so a lot's
    numbers do not depend on the rest of the batch. Non-finite values are left out of their head too.
    Each head's own t-test p is Holm-adjusted across the lot's heads that have one (``p_holm``). The
    heads are compared by one-way ANOVA (all lots at once), or by Kruskal–Wallis for a lot whose
    normality gate failed (``sw_failed``), one lot at a time.
    """
    idx = [i for i, lot in enumerate(lots) if lot.heads is not None and lot.values is not None and raw_len[i]]
    if not idx:
        return {}
    names = np.concatenate([np.asarray(lots[i].heads).astype(str) for i in idx])
    vals = np.concatenate([lots[i].values for i in idx])
    owner = np.repeat(np.arange(len(idx)), raw_len[idx])
    keep = np.isfinite(vals)
    names, vals, owner = names[keep], vals[keep], owner[keep]
    labels, code = np.unique(names, return_inverse=True)
    keys, group = np.unique(owner * labels.shape[0] + code, return_inverse=True)
    grouped = vals[np.argsort(group, kind="stable")]
    hn, hmean, hvar = segment_moments(grouped, np.bincount(group))
    res = t_test_arrays(np.maximum(hn, 2), hmean, hvar, rule.target, rule.alternative, rule.alpha)
    testable = (hn >= 2) & (hvar > 0)
    group_lot = keys // labels.shape[0]
    per_lot = np.bincount(group_lot, minlength=len(idx))
    p_holm = np.full(hn.shape[0], np.nan)
    p_holm[testable] = holm_segments(res["p_value"][testable], np.bincount(group_lot[testable], minlength=len(idx)))
    sd = np.where(hn >= 2, np.sqrt(np.where(hn >= 2, hvar, 0.0)), np.nan)
    rows = [HeadSummary(head=h, n=c, mean=m, sd=s if c >= 2 else None, offset=m - rule.target,
                        p_value=p if t else None, p_holm=a if t else None)
            for h, c, m, s, p, a, t in zip(labels[keys % labels.shape[0]].tolist(), hn.tolist(), hmean.tolist(),
                                           sd.tolist(), res["p_value"].tolist(), p_holm.tolist(),
                                           testable.tolist(), strict=True)]
    f, fp, dfb, dfw = (col.tolist() for col in anova_segments(grouped, hn, per_lot))
    bounds = np.searchsorted(group_lot, np.arange(len(idx) + 1)).tolist()
    value_bounds = np.r_[0, np.cumsum(hn)].tolist()
    failed = sw_failed.tolist()
    out: dict[int, _HeadRows] = {}
    for j, i in enumerate(idx):
        a, b = bounds[j], bounds[j + 1]
        k, total = b - a, value_bounds[b] - value_bounds[a]
        kruskal = failed[i]
        test: HeadsTest | None = None
        why: str | None = None
        if k == 0:
            why = "no head has a usable value"
        elif k == 1:
            why = f"only 1 head with data ({rows[a].head}): no other head to compare it with"
        elif total <= k:
            why = f"too few values to compare the heads: {total} values in {k} heads, one per head"
        elif kruskal:
            r = kruskal_wallis(grouped[value_bounds[a]:value_bounds[b]], np.repeat(np.arange(k), hn[a:b]))
            if math.isnan(r.statistic):
                why = "all values are equal: Kruskal–Wallis has nothing to rank"
            else:
                test = HeadsTest("kruskal", r.statistic, r.p_value, r.df_between, None,
                                 f"Kruskal–Wallis across {k} heads (ties corrected; chi-square, {k - 1} df), as "
                                 "Shapiro–Wilk rejected normality")
        elif math.isnan(f[j]):
            why = "the values do not vary within any head: the F ratio is undefined"
        else:
            test = HeadsTest("anova", f[j], fp[j], dfb[j], dfw[j],
                             f"one-way ANOVA across {k} heads, F({dfb[j]}, {dfw[j]})")
        out[i] = (tuple(rows[a:b]), test, why)
    return out


def _standout_head(heads: tuple[HeadSummary, ...], alpha: float) -> HeadSummary | None:
    """The head furthest off target, if it is off on its own Holm-adjusted test and twice as far off as any
    other."""
    if len(heads) < 2:
        return None
    ranked = sorted(heads, key=lambda h: abs(h.offset), reverse=True)
    top, second = ranked[0], ranked[1]
    if top.p_holm is not None and top.p_holm < alpha and abs(top.offset) >= 2.0 * abs(second.offset):
        return top
    return None


def _normality(lot: LotData, rule: Rule, gate: int, n: int, w: float, p: float, flat: bool) -> NormalityResult:
    nr = rule.normality
    if not nr.enabled:
        return NormalityResult(test=None, statistic=None, p_value=None, passed=None, note="gate off")
    if gate != _OK:
        return NormalityResult(test=None, statistic=None, p_value=None, passed=None,
                               note="not assessed: the lot went to review at an earlier gate")
    if lot.values is None:
        return NormalityResult(test=None, statistic=None, p_value=None, passed=None,
                               note=f"not assessed: summary only (n, mean, sd); on_unassessed = {nr.on_unassessed}")
    if n < SW_MIN_N:
        return NormalityResult(test=None, statistic=None, p_value=None, passed=None,
                               note=f"not assessed: n < {SW_MIN_N}; on_unassessed = {nr.on_unassessed}")
    if flat:
        return NormalityResult(test=None, statistic=None, p_value=None, passed=None,
                               note=f"not assessed: the values do not vary; on_unassessed = {nr.on_unassessed}")
    if n > SW_MAX_N:
        return NormalityResult(test="shapiro", statistic=None, p_value=None, passed=None, note=NOTE_LARGE_N)
    passed = p >= nr.alpha
    return NormalityResult(test="shapiro", statistic=w, p_value=p, passed=passed,
                           note=f"Shapiro–Wilk at alpha {nr.alpha:g}: {'passed' if passed else 'failed'}")


def _sw_p(normality: NormalityResult) -> float:
    """The Shapiro–Wilk p-value of an assessed gate (NaN if, impossibly, it is missing)."""
    return math.nan if normality.p_value is None else normality.p_value


def _opt(v: float) -> float | None:
    return v if math.isfinite(v) else None


def _verdict(lot: LotData, rule: Rule, i: int, c: _Columns, values: np.ndarray | None, parametric: bool,
             wilcoxon: bool, head_part: _HeadRows) -> Verdict:
    head_rows, heads_test, heads_note = head_part
    n, mean, sd, gate = c.n[i], c.mean[i], c.sd[i], c.gate[i]
    unit = lot.unit
    dec = quantity_decimals(_opt(sd))
    def q(v: float, measured: bool = True) -> str:
        """A measured quantity keeps its decimals (342.0); a set one (target, shift) drops trailing zeros."""
        text = format_quantity(v, dec, strip=not measured)
        return f"{text} {unit}" if unit else text
    normality = _normality(lot, rule, gate, n, c.sw_w[i], c.sw_p[i], c.flat[i])
    standout = _standout_head(head_rows, rule.alpha)
    pw = _opt(c.power[i])
    nfp = c.nfp[i] if c.nfp[i] > 0 else None
    fields: dict[str, Any] = {"test": None, "statistic": None, "df": None, "p_value": None,
                              "critical_value": None, "se": None, "ci_low": None, "ci_high": None}
    extras: list[str] = []
    wilcoxon_info = None
    if parametric:
        t = c.test
        fields.update(test="z" if rule.known_sd is not None else "t", statistic=t["statistic"][i],
                      df=_opt(t["df"][i]), p_value=t["p_value"][i], critical_value=t["critical_value"][i],
                      se=t["se"][i], ci_low=_opt(t["ci_low"][i]), ci_high=_opt(t["ci_high"][i]))
        verdict = "hold" if fields["p_value"] < rule.alpha else "pass"
        reason = _test_reason(verdict, "mean", mean, rule, fields, q, pw, nfp)
        if normality.passed is False:
            extras.append(f"Shapiro–Wilk rejected normality ({format_p(_sw_p(normality), rule.normality.alpha)})"
                          " but the rule ignores that")
    elif wilcoxon and values is not None and (signed_differences(values, rule.target) != 0).any():
        r = wilcoxon_test(values, rule.target, rule.alternative, rule.alpha)
        fields.update(test="wilcoxon", statistic=r.statistic, p_value=r.p_value)
        wilcoxon_info = WilcoxonInfo(method=r.method, zeros=r.zeros, n_used=r.n_used)
        verdict = "hold" if r.p_value < rule.alpha else "pass"
        reason = _test_reason(verdict, "pseudo-median", r.estimate, rule, fields, q, None, None)
        how = "p exact" if r.method == "exact" else f"p by {r.method}"
        dropped = f", {plural(r.zeros, 'value')} on target left out" if r.zeros else ""
        extras.append(f"Wilcoxon signed-rank test of location (pseudo-median), {how}{dropped}, as Shapiro–Wilk "
                      f"rejected normality ({format_p(_sw_p(normality), rule.normality.alpha)})")
        pw = nfp = None
    elif wilcoxon:
        verdict = "review"
        reason = (f"every value equals the target {q(rule.target, False)} to the data's decimals: "
                  "the signed-rank test has nothing to rank")
        pw = nfp = None
    else:
        verdict = "review"
        reason = _review_reason(lot, rule, gate, n, mean, sd, normality, q, c.mixup[i])
    equivalence = None
    if rule.release == "equivalence" and rule.margin is not None and verdict == "pass":
        equivalence, verdict, shown_text = _equivalence(rule, fields["test"], n, mean, sd, unit)
        if verdict == "review":
            reason = shown_text
        else:
            extras.append(shown_text)
    if standout is not None and verdict != "pass" and gate != _UNIT:
        extras.append(f"head {standout.head} is furthest off ({format_quantity(standout.offset, dec)} {unit})")
    excluded_by = (excluded_counts(lot.excluded_by, c.excluded[i]) if c.excluded[i] or lot.excluded_by
                   else _NO_EXCLUSIONS.copy())                      # the common case, without the general path
    if lot.unit_assumed:
        extras.append(f"values carry no unit: taken to be in {unit}, the rule's unit" if unit else
                      "values and target carry no unit (give the rule a unit to have it checked)")
    if c.excluded[i]:
        extras.append(format_excluded(excluded_by))
    aq = None
    if rule.nominal is not None and values is not None and n > 0:   # block owned by monitor.quantity
        from monitor.quantity import screen_lot
        with np.errstate(all="ignore"):
            aq = screen_lot(values, rule)
        extras.append(aq.reason + " (a screen, not a legal verdict)")   # shown on pass too
        if aq.needs_review:
            if verdict != "hold":
                verdict = "review"
        elif not aq.passed:
            verdict = "hold"
    if extras:
        reason += "; " + "; ".join(extras)
    effect = None
    if n >= 2 and not math.isnan(mean) and gate != _UNIT:
        spread = rule.known_sd if rule.known_sd is not None else sd
        effect = _opt((mean - rule.target) / spread) if spread and spread > 0 else None
    given = None
    if gate != _UNIT and n > 0 and math.isfinite(mean):
        given = giveaway_of(mean, n, nominal=rule.nominal, target=rule.target, cost_per_unit=rule.cost_per_unit,
                            currency=rule.currency)
    return Verdict(equivalence=equivalence, key=lot.key, rule=rule.name, rule_version=rule.version, n=n,
                   mean=_opt(mean),
                   sd=_opt(sd) if n >= 2 else None, giveaway=given, target=rule.target, unit=unit,
                   alternative=rule.alternative,
                   alpha=rule.alpha, effect_size=effect, normality=normality, power=pw, n_for_power=nfp,
                   verdict=verdict, reason=reason, excluded=c.excluded[i], heads=head_rows, files=lot.files,
                   average_quantity=aq, unit_assumed=lot.unit_assumed, excluded_by=excluded_by,
                   wilcoxon=wilcoxon_info, runs=lot.runs, heads_test=heads_test, heads_test_note=heads_note,
                   **fields)


def _equivalence(rule: Rule, test: str | None, n: int, mean: float, sd: float, unit: str
                 ) -> tuple[Equivalence | None, str, str]:
    """With ``release = "equivalence"``, a lot not shown off target passes only when two one-sided tests show
    its mean within target ± margin: (result, "pass" | "review", the text for the reason)."""
    assert rule.margin is not None
    margin_text = f"±{format_quantity(rule.margin, 6, strip=True)} {unit}".rstrip()
    if test not in ("t", "z"):
        return None, "review", (f"not shown within {margin_text} of target: the two one-sided tests need the t- or "
                                "z-test, and normality ruled the t-test out")
    try:
        if rule.known_sd is not None:
            eq = tost_z(n, mean, rule.known_sd, rule.target, rule.margin, rule.alpha)
        else:
            eq = tost_t(n, mean, sd, rule.target, rule.margin, rule.alpha)
    except ValueError as exc:
        return None, "review", f"not shown within {margin_text} of target: {exc}"
    if eq.shown:
        return eq, "pass", (f"shown within {margin_text} of target by two one-sided tests "
                            f"({format_p(eq.p_value, rule.alpha)})")
    needed = n_to_show(mean, sd, rule.target, rule.margin, rule.alpha, known_sd=rule.known_sd)
    return eq, "review", not_shown_reason(rule.margin, rule.target, unit, needed,
                                          known_sd=rule.known_sd is not None)


def _test_reason(verdict: str, what: str, estimate: float, rule: Rule, f: dict[str, Any], q: Any,
                 pw: float | None, nfp: int | None) -> str:
    p_text = format_p(f["p_value"], rule.alpha)
    if verdict == "hold":
        side = "below" if estimate < rule.target else "above"
        stat = f"{f['test']} = {format_statistic(f['statistic'])}, " if f["test"] in ("t", "z") else ""
        return (f"{what} {q(estimate)} is {side} target {q(rule.target, False)} by {q(abs(estimate - rule.target))} "
                f"({stat}{p_text})")
    text = f"{what} {q(estimate)} vs target {q(rule.target, False)}: no shift shown ({p_text})"
    if pw is None or rule.shift_of_interest is None:
        return text
    sign = {"two-sided": "±", "less": "−", "greater": "+"}[rule.alternative]
    shift = f"{sign}{q(rule.shift_of_interest, False)}"
    if pw >= rule.target_power:
        return text + f"; power {pw:.2f} to detect {shift}, so a shift that size would likely have shown"
    more = (f"n ≥ {nfp} would give {rule.target_power:.2f}" if nfp is not None
            else f"not even 10^9 units would give {rule.target_power:.2f}")
    return text + f"; power {pw:.2f} to detect {shift} — too few units to rule that shift out; {more}"


def _summary_problem(lot: LotData) -> str:
    """What makes a lot summary unusable, naming the field and its value."""
    s = lot.summary
    if s is None:
        return "no data"
    whole = isinstance(s.n, (int, np.integer)) or (isinstance(s.n, float) and s.n.is_integer())
    if not whole or s.n < 0:
        return f"n {s.n!r} is not a whole number >= 0"
    if not math.isfinite(s.mean):
        return f"mean {s.mean!r} is not finite"
    if not math.isfinite(s.sd):
        return f"sd {s.sd!r} is not finite (n = {s.n})"
    if s.sd < 0:
        return f"sd {s.sd!r} is negative"
    return f"sd {s.sd!r} {lot.unit} is too large to square (overflow)"


def _review_reason(lot: LotData, rule: Rule, gate: int, n: int, mean: float, sd: float,
                   normality: NormalityResult, q: Any, mixup: int) -> str:
    if gate == _UNIT:
        likely = _mixup_candidates(lot.unit)[mixup][0]
        shown = format_quantity(mean, max(0, 3 - math.floor(math.log10(mean))), strip=False)   # 4 digits
        return (f"values look like {likely}, not {lot.unit}: mean {shown} against target "
                f"{format_quantity(rule.target, 6)} {lot.unit}; no test was run (check the unit of the export "
                "or its profile)")
    if gate == _BAD:
        if lot.values is None:
            return f"the lot summary is not usable: {_summary_problem(lot)}"
        return "the values are too large in magnitude to compute a mean and sd (overflow)"
    if gate == _N_LT2:
        if n == 0:
            return "no usable values to judge"
        if rule.known_sd is not None:
            return f"only 1 unit; the rule needs at least {rule.min_n} to judge"
        return "only 1 unit; at least 2 are needed for a standard deviation"
    if gate == _MIN_N:
        return f"only {n} units; the rule needs at least {rule.min_n} to judge"
    if gate == _FLAT:
        if sd == 0:
            return (f"all {n} values are identical ({q(mean, False)}): stuck sensor or rounding? "
                    "the t statistic is undefined")
        return (f"the {n} values do not vary beyond rounding (sd {sd:.3g} {lot.unit} at mean {q(mean)}): "
                "the t statistic is meaningless")
    test = "t" if rule.known_sd is None else "z"
    if normality.passed is False:
        return (f"Shapiro–Wilk rejects normality (W = {normality.statistic:.3f}, "
                f"{format_p(_sw_p(normality), rule.normality.alpha)}); the {test}-test may mislead here")
    if lot.values is None:
        return "normality cannot be assessed from a summary (n, mean, sd) and the rule asks for review"
    return f"normality cannot be assessed with only {n} units and the rule asks for review"
