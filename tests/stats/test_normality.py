"""Shapiro–Wilk (Royston's algorithm) against scipy.stats.shapiro, the 1965 paper and NIST StRD sets."""

from pathlib import Path

import numpy as np
import pytest
from scipy import stats

from monitor.stats.normality import (
    shapiro_coefficients,
    shapiro_wilk,
    shapiro_wilk_rows,
)

NIST = Path(__file__).resolve().parent.parent / "data" / "nist"


def test_paper_example_1():
    """Shapiro & Wilk (1965) §4 Example 1: W ≈ 0.79 (memory) below the 1 % point 0.792 (memory);
    Royston's algorithm gives W = 0.7888146948631716, p = 0.006703814061898823 (Royston 1995, AS R94, as computed by scipy.stats.shapiro)."""
    r = shapiro_wilk([148, 154, 158, 160, 161, 162, 166, 170, 182, 195, 236])
    assert r.statistic == pytest.approx(0.79, abs=0.005)
    assert r.statistic < 0.792
    assert r.statistic == pytest.approx(0.7888146948631716, rel=1e-12)
    assert r.p_value == pytest.approx(0.006703814061898823, rel=1e-9)


@pytest.mark.parametrize("values,w,w_abs,p,p_abs", [
    # Source: scipy/stats/tests/test_morestats.py, TestShapiro.test_basic (x1, x2 and x4 "extracted from
    # the original paper"), with the decimals scipy checks them to.
    ([0.11, 7.87, 4.61, 10.14, 7.95, 3.14, 0.46, 4.43, 0.21, 4.75, 0.71, 1.52, 3.24, 0.93, 0.42, 4.97, 9.53,
      4.55, 0.47, 6.66], 0.90047299861907959, 1.5e-6, 0.042089745402336121, 1.5e-6),
    ([1.36, 1.14, 2.92, 2.55, 1.46, 1.06, 5.27, -1.11, 3.48, 1.10, 0.88, -0.51, 1.46, 0.52, 6.20, 1.69, 0.08,
      3.67, 2.81, 3.49], 0.9590270, 1.5e-6, 0.52460, 1.5e-3),
    ([0.139, 0.157, 0.175, 0.256, 0.344, 0.413, 0.503, 0.577, 0.614, 0.655, 0.954, 1.392, 1.557, 1.648, 1.690,
      1.994, 2.174, 2.206, 3.245, 3.510, 3.571, 4.354, 4.980, 6.084, 8.351], 0.83467, 1.5e-4, 0.000914, 1.5e-6),
])
def test_scipy_test_suite_values(values, w, w_abs, p, p_abs):
    """The published values of scipy's own Shapiro–Wilk tests."""
    r = shapiro_wilk(values)
    assert r.statistic == pytest.approx(w, abs=w_abs)
    assert r.p_value == pytest.approx(p, abs=p_abs)


@pytest.mark.parametrize("name,p,passes", [("Michelso", 0.51370, True), ("Mavro", 0.000511, False),
                                           ("Lew", 4.44e-10, False)])
def test_nist_sets(name, p, passes):
    """NIST StRD Michelso passes a 0.05 gate, Mavro and Lew fail (NIST StRD data; p-values as computed by scipy.stats.shapiro)."""
    r = shapiro_wilk(np.loadtxt(NIST / f"{name}.csv", skiprows=1))
    assert r.p_value == pytest.approx(p, rel=5e-3)
    assert (r.p_value >= 0.05) is passes


@pytest.mark.parametrize("n", list(range(3, 31)) + [49, 50, 51, 99, 257, 1000, 4999, 5000])
def test_matches_scipy_shapiro(n):
    """W and p equal scipy.stats.shapiro (same published algorithm) over random samples (reference library)."""
    rng = np.random.default_rng(n)
    samples = [rng.normal(500, 2, n), rng.exponential(1.0, n) + 100, rng.standard_t(3, n),
               np.round(rng.normal(340, 1, n), 1), rng.uniform(0, 1, n)]
    for x in samples:
        if np.ptp(x) == 0:
            continue
        ref = stats.shapiro(x)
        r = shapiro_wilk(x)
        assert r.statistic == pytest.approx(ref.statistic, rel=1e-12)
        assert r.p_value == pytest.approx(ref.pvalue, rel=1e-9, abs=1e-300)


def test_rows_equal_one_at_a_time():
    """The matrix form gives, row by row, exactly what a single sample gives."""
    rng = np.random.default_rng(3)
    rows = np.sort(rng.normal(1000, 5, (64, 40)), axis=1)
    w, p = shapiro_wilk_rows(rows)
    for i in (0, 17, 63):
        w1, p1 = shapiro_wilk_rows(rows[i:i + 1])
        assert (w[i], p[i]) == (w1[0], p1[0])


def test_coefficients_known_small_n():
    """n = 3: a = (−√½, 0, √½) (Royston 1995, exact); the coefficients have unit length (Royston 1992)."""
    np.testing.assert_allclose(shapiro_coefficients(3), [-np.sqrt(0.5), 0, np.sqrt(0.5)], rtol=1e-15)
    for n in (4, 5, 6, 11, 12, 100, 5000):
        assert np.sum(shapiro_coefficients(n) ** 2) == pytest.approx(1.0, rel=1e-9)


def test_n3_exact_p_value():
    """n = 3: p = 1 − (6/π)·acos(√W) (exact distribution; scipy.stats.shapiro as reference)."""
    x = [1.0, 2.0, 4.0]
    r = shapiro_wilk(x)
    assert r.p_value == pytest.approx(1 - 6 / np.pi * np.arccos(np.sqrt(r.statistic)), rel=1e-12)
    assert r.p_value == pytest.approx(stats.shapiro(x).pvalue, rel=1e-10)


def test_refuses_what_it_cannot_judge():
    """n < 3, n > 5000, all-equal or non-finite values raise ValueError; a flat matrix row gives NaN."""
    with pytest.raises(ValueError, match="3 <= n <= 5000"):
        shapiro_wilk([1.0, 2.0])
    with pytest.raises(ValueError, match="3 <= n <= 5000"):
        shapiro_wilk(np.arange(5001.0))
    with pytest.raises(ValueError, match="equal"):
        shapiro_wilk([2.0, 2.0, 2.0])
    with pytest.raises(ValueError, match="finite"):
        shapiro_wilk([1.0, np.inf, 2.0])
    w, p = shapiro_wilk_rows(np.array([[5.0, 5.0, 5.0, 5.0]]))
    assert np.isnan(w[0]) and np.isnan(p[0])
