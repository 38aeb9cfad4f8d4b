"""Applies a rule to a lot: gates (min n, normality), the location test, interval, power -> Verdict.

Pure: no I/O, no clock, no logging. ``evaluate`` judges one lot; ``evaluate_many`` judges many lots of one
rule at once: moments are numpy segment reductions over the lots' values concatenated end to end,
Shapiro–Wilk runs on one matrix per lot size, t / z tests and power are scipy functions on arrays.
``evaluate`` is ``evaluate_many`` on a one-lot batch, and every per-lot number depends only on that lot's
values, so a lot gets the same Verdict alone or in any batch.

Gates, in order (each sends the lot to "review" with a plain reason, and no test verdict is given):
non-finite values are left out and counted; n < 2; n < ``rule.min_n``; no spread (all values equal, or a
spread at the floating-point resolution of the mean); then the normality gate. Normality (when enabled):
Shapiro–Wilk for 3 <= n <= 5000. Above 5000 it is not assessed, by choice: Royston's p-value approximation
is not valid there, and by the central limit theorem the t-test on the mean of more than 5000 units is
robust to the non-normality fillers produce, so the lot proceeds to the t-test with a note. Lots whose
normality cannot be assessed (summaries, n = 2) follow ``normality.on_unassessed``. A rule with a
``nominal`` also gets the average-quantity screen (monitor.quantity); a failed screen holds the lot.

lotwarden screens lots; net-quantity compliance is decided under local weights-and-measures law by the
competent authority (``SCREENING_NOTE``).
"""

from __future__ import annotations

from typing import Any, Sequence

import numpy as np

from monitor.lot import HeadSummary, LotData, NormalityResult, Verdict
from monitor.rulebook import Rule
from monitor.stats.location import t_test_arrays, z_test_arrays
from monitor.stats.moments import segment_moments
from monitor.stats.normality import MAX_N as SW_MAX_N
from monitor.stats.normality import MIN_N as SW_MIN_N
from monitor.stats.normality import shapiro_wilk_rows
from monitor.stats.power import n_for_power, power
from monitor.stats.wilcoxon import wilcoxon_test
from monitor.stats.wording import format_p, format_quantity, format_statistic, quantity_decimals

__all__ = ["SCREENING_NOTE", "evaluate", "evaluate_many"]

SCREENING_NOTE = ("lotwarden screens lots; net-quantity compliance is decided under local weights-and-measures "
                  "law by the competent authority.")
NOTE_LARGE_N = "not assessed: n > 5000; the t-test on the mean relies on the central limit theorem"
_RESOLUTION_ULPS = 8.0     # an sd below this many ulps of the mean is rounding noise, not spread

# gate codes
_OK, _N_LT2, _MIN_N, _FLAT, _BAD = 0, 1, 2, 3, 4


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
    for i in np.flatnonzero(~has_values):
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
        flat = np.where(has_values, hi == lo, sd == 0) | (sd <= _RESOLUTION_ULPS * np.spacing(np.abs(mean)))
    gate = np.full(k, _OK)
    gate[flat & (n >= 2)] = _FLAT
    gate[(n >= 2) & ~(np.isfinite(mean) & np.isfinite(var))] = _BAD
    gate[n < rule.min_n] = _MIN_N
    gate[n < 2] = _N_LT2
    gate[~summary_ok] = _BAD
    ok = gate == _OK

    sw_w, sw_p = _shapiro_by_size(x, starts, n, ok & has_values & rule.normality.enabled)
    sw_failed = ok & (sw_p < rule.normality.alpha)

    tested = ok.copy()
    if rule.normality.enabled and rule.normality.on_unassessed == "review":
        tested &= ~(~has_values | (n < SW_MIN_N))
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
                   nfp=nfp.tolist(), test=cols)
    heads = _head_breakdown(lots, raw_len, rule)
    out: list[Verdict] = []
    for i, lot in enumerate(lots):
        values = x[starts[i]:starts[i] + n[i]] if lot.values is not None else None
        out.append(_verdict(lot, rule, i, ctx, values, bool(parametric[i]), bool(use_wilcoxon[i]),
                            heads.get(i, ())))
    return out


class _Columns:
    """Per-lot numbers of a batch as Python lists (fast scalar access while building Verdicts)."""

    def __init__(self, **cols: Any) -> None:
        self.__dict__.update(cols)


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
    for a, b in zip(bounds[:-1], bounds[1:]):
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


def _head_breakdown(lots: list[LotData], raw_len: np.ndarray, rule: Rule) -> dict[int, tuple[HeadSummary, ...]]:
    """Per-head summaries for every lot that names its heads, all (lot, head) groups in one segment pass.

    Groups are ordered by lot, then head name; inside a group values keep arrival order, so a lot's
    numbers do not depend on the rest of the batch. Non-finite values are left out of their head too.
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
    hn, hmean, hvar = segment_moments(vals[np.argsort(group, kind="stable")], np.bincount(group))
    res = t_test_arrays(np.maximum(hn, 2), hmean, hvar, rule.target, rule.alternative, rule.alpha)
    testable = (hn >= 2) & (hvar > 0)
    sd = np.where(hn >= 2, np.sqrt(np.where(hn >= 2, hvar, 0.0)), np.nan)
    rows = [HeadSummary(head=h, n=c, mean=m, sd=s if c >= 2 else None, offset=m - rule.target,
                        p_value=p if t else None)
            for h, c, m, s, p, t in zip(labels[keys % labels.shape[0]].tolist(), hn.tolist(), hmean.tolist(),
                                        sd.tolist(), res["p_value"].tolist(), testable.tolist())]
    bounds = np.searchsorted(keys // labels.shape[0], np.arange(len(idx) + 1)).tolist()
    return {i: tuple(rows[bounds[j]:bounds[j + 1]]) for j, i in enumerate(idx)}


def _standout_head(heads: tuple[HeadSummary, ...], alpha: float) -> HeadSummary | None:
    """The head furthest off target, if it is off on its own test and twice as far off as any other."""
    if len(heads) < 2:
        return None
    ranked = sorted(heads, key=lambda h: abs(h.offset), reverse=True)
    top, second = ranked[0], ranked[1]
    if top.p_value is not None and top.p_value < alpha and abs(top.offset) >= 2.0 * abs(second.offset):
        return top
    return None


def _normality(lot: LotData, rule: Rule, gate: int, n: int, w: float, p: float) -> NormalityResult:
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
    if n > SW_MAX_N:
        return NormalityResult(test="shapiro", statistic=None, p_value=None, passed=None, note=NOTE_LARGE_N)
    passed = p >= nr.alpha
    return NormalityResult(test="shapiro", statistic=w, p_value=p, passed=passed,
                           note=f"Shapiro–Wilk at alpha {nr.alpha:g}: {'passed' if passed else 'failed'}")


def _opt(v: float) -> float | None:
    return v if v == v and v not in (float("inf"), float("-inf")) else None


def _verdict(lot: LotData, rule: Rule, i: int, c: _Columns, values: np.ndarray | None, parametric: bool,
             wilcoxon: bool, head_rows: tuple[HeadSummary, ...]) -> Verdict:
    n, mean, sd, gate = c.n[i], c.mean[i], c.sd[i], c.gate[i]
    unit = lot.unit
    dec = quantity_decimals(_opt(sd))
    def q(v: float, measured: bool = True) -> str:
        """A measured quantity keeps its decimals (342.0); a set one (target, shift) drops trailing zeros."""
        return f"{format_quantity(v, dec, strip=not measured)} {unit}"
    normality = _normality(lot, rule, gate, n, c.sw_w[i], c.sw_p[i])
    standout = _standout_head(head_rows, rule.alpha)
    pw = _opt(c.power[i])
    nfp = c.nfp[i] if c.nfp[i] > 0 else None
    fields: dict[str, Any] = dict(test=None, statistic=None, df=None, p_value=None, critical_value=None,
                                  se=None, ci_low=None, ci_high=None)
    extras: list[str] = []
    if parametric:
        t = c.test
        fields.update(test="z" if rule.known_sd is not None else "t", statistic=t["statistic"][i],
                      df=_opt(t["df"][i]), p_value=t["p_value"][i], critical_value=t["critical_value"][i],
                      se=t["se"][i], ci_low=_opt(t["ci_low"][i]), ci_high=_opt(t["ci_high"][i]))
        verdict = "hold" if fields["p_value"] < rule.alpha else "pass"
        reason = _test_reason(verdict, "mean", mean, rule, fields, q, pw, nfp)
        if normality.passed is False:
            extras.append(f"Shapiro–Wilk rejected normality ({format_p(normality.p_value, rule.normality.alpha)})"
                          " but the rule ignores that")
    elif wilcoxon:
        assert values is not None
        r = wilcoxon_test(values, rule.target, rule.alternative, rule.alpha)
        fields.update(test="wilcoxon", statistic=r.statistic, p_value=r.p_value)
        verdict = "hold" if r.p_value < rule.alpha else "pass"
        reason = _test_reason(verdict, "median", r.estimate, rule, fields, q, None, None)
        extras.append(f"Wilcoxon signed-rank test of the median, as Shapiro–Wilk rejected normality "
                      f"({format_p(normality.p_value, rule.normality.alpha)})")
        pw = nfp = None
    else:
        verdict = "review"
        reason = _review_reason(lot, rule, gate, n, mean, sd, normality, q)
    if standout is not None and verdict != "pass":
        extras.append(f"head {standout.head} is furthest off ({format_quantity(standout.offset, dec)} {unit})")
    if c.excluded[i]:
        k = c.excluded[i]
        extras.append(f"{k} non-finite value{'s' if k != 1 else ''} left out")
    aq = None
    if rule.nominal is not None and values is not None and n > 0:   # block owned by monitor.quantity
        from monitor.quantity import screen_lot
        with np.errstate(all="ignore"):
            aq = screen_lot(values, rule)
        if not aq.passed:
            extras.append(aq.reason + " (a screen, not a legal verdict)")
            verdict = "hold"
    if extras:
        reason += "; " + "; ".join(extras)
    effect = None
    if n >= 2 and mean == mean:
        spread = rule.known_sd if rule.known_sd is not None else sd
        effect = _opt((mean - rule.target) / spread) if spread and spread > 0 else None
    return Verdict(key=lot.key, rule=rule.name, rule_version=rule.version, n=n, mean=_opt(mean),
                   sd=_opt(sd) if n >= 2 else None, target=rule.target, unit=unit, alternative=rule.alternative,
                   alpha=rule.alpha, effect_size=effect, normality=normality, power=pw, n_for_power=nfp,
                   verdict=verdict, reason=reason, excluded=c.excluded[i], heads=head_rows, files=lot.files,
                   average_quantity=aq, **fields)


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


def _review_reason(lot: LotData, rule: Rule, gate: int, n: int, mean: float, sd: float,
                   normality: NormalityResult, q: Any) -> str:
    if gate == _BAD:
        if lot.values is None:
            s = lot.summary
            return f"the lot summary is not usable (n={s.n!r}, mean={s.mean!r}, sd={s.sd!r})" if s else "no data"
        return "the values are too large in magnitude to compute a mean and sd (overflow)"
    if gate == _N_LT2:
        if n == 0:
            return "no usable values to judge"
        return "only 1 unit; at least 2 are needed for a standard deviation"
    if gate == _MIN_N:
        return f"only {n} units; the rule needs at least {rule.min_n} to judge"
    if gate == _FLAT:
        if sd == 0:
            return (f"all {n} values are identical ({q(mean, False)}): stuck sensor or rounding? "
                    "the t statistic is undefined")
        return (f"the {n} values do not vary beyond rounding (sd {sd:.3g} {lot.unit} at mean {q(mean)}): "
                "the t statistic is meaningless")
    if normality.passed is False:
        return (f"Shapiro–Wilk rejects normality (W = {normality.statistic:.3f}, "
                f"{format_p(normality.p_value, rule.normality.alpha)}); the t-test may mislead here")
    if lot.values is None:
        return "normality cannot be assessed from a summary (n, mean, sd) and the rule asks for review"
    return f"normality cannot be assessed with only {n} units and the rule asks for review"
