"""Benchmark: evaluate_many on 10,000 lots of 50 values vs a per-lot scipy ttest_1samp + shapiro loop.

Run by hand (``python bench/bench_batch.py``); prints both timings and their ratio, measured in the same
process, after checking that both give the same statistics. The batch path must be at least 5x faster.
"""

from __future__ import annotations

import sys
import time

import numpy as np
from scipy import stats

from monitor.engine import evaluate_many
from monitor.lot import LotData, LotKey
from monitor.rulebook import NormalityRule, Rule

LOTS, SIZE, TARGET = 10_000, 50, 500.0
REQUIRED = 5.0


def make_lots(seed: int = 20261201) -> list[LotData]:
    """10,000 invented OAT-500 lots (Brackenfield Foods, line L1) of 50 fills each."""
    rng = np.random.default_rng(seed)
    shift = rng.normal(0.0, 0.5, LOTS)
    return [LotData(LotKey("L1", "OAT-500", f"B{i:05d}"), values=rng.normal(TARGET + shift[i], 2.0, SIZE))
            for i in range(LOTS)]


def baseline(lots: list[LotData]) -> list[tuple[float, float, float, float]]:
    """The straightforward loop: scipy's t-test and Shapiro–Wilk lot by lot."""
    out = []
    for lot in lots:
        t = stats.ttest_1samp(lot.values, TARGET)
        w = stats.shapiro(lot.values)
        out.append((float(t.statistic), float(t.pvalue), float(w.statistic), float(w.pvalue)))
    return out


def best_of(fn, *args, repeat: int = 3) -> tuple[float, object]:
    best, result = float("inf"), None
    for _ in range(repeat):
        t0 = time.perf_counter()
        result = fn(*args)
        best = min(best, time.perf_counter() - t0)
    return best, result


def main() -> int:
    lots = make_lots()
    # on_fail "ignore": every lot gets Shapiro–Wilk and the t-test, as the baseline computes both
    rule = Rule.adhoc(target=TARGET, normality=NormalityRule(on_fail="ignore"))
    t_batch, verdicts = best_of(evaluate_many, lots, rule)
    t_loop, ref = best_of(baseline, lots, repeat=1)
    worst = 0.0
    for v, (t, p, w, pw) in zip(verdicts, ref):
        got = (v.statistic, v.p_value, v.normality.statistic, v.normality.p_value)
        for mine, theirs in zip(got, (t, p, w, pw)):
            # relative, except near 0: a t of 2e-4 comes from mean − target ≈ 6e-5 at a mean of 500, where one
            # ulp of the mean already moves t by 1e-9 relative (our two-pass mean is the closer one there)
            worst = max(worst, abs(mine - theirs) / max(abs(theirs), 1.0))
    assert worst < 1e-9, f"batch and scipy disagree: worst relative difference {worst:.3g}"
    ratio = t_loop / t_batch
    print(f"lots: {LOTS} x {SIZE} values")
    print(f"scipy loop (ttest_1samp + shapiro): {t_loop:.3f} s")
    print(f"evaluate_many (full verdicts):      {t_batch:.3f} s")
    print(f"speed-up: {ratio:.1f}x (required >= {REQUIRED:.0f}x); worst relative difference {worst:.2g}")
    return 0 if ratio >= REQUIRED else 1


if __name__ == "__main__":
    sys.exit(main())
