"""Stable mean / sd against the NIST StRD univariate certified values."""

from pathlib import Path

import numpy as np
import pytest

from monitor.stats.moments import compute_moments, segment_moments

NIST = Path(__file__).resolve().parent.parent / "data" / "nist"

# Source: NIST Statistical Reference Datasets, univariate summary statistics, certified values
# (https://www.itl.nist.gov/div898/strd/univ/, one page per dataset). (name, certified mean, certified sd, sd rel. tolerance)
CERTIFIED = [
    ("PiDigits", 4.53480000000000, 2.86733906028871, 1e-13),
    ("Lottery", 518.958715596330, 291.699727470969, 1e-13),
    ("Lew", -177.435000000000, 277.332168044316, 1e-13),
    ("Mavro", 2.00185600000000, 0.000429123454003053, 1e-10),
    ("Michelso", 299.852400000000, 0.0790105478190518, 1e-11),
    ("NumAcc1", 10000002.0, 1.0, 1e-13),
    ("NumAcc2", 1.2, 0.1, 1e-12),
    ("NumAcc3", 1000000.2, 0.1, 1e-8),    # parsing to float64 already moves the exact sd (NIST StRD NumAcc3 certified values)
    ("NumAcc4", 10000000.2, 0.1, 1e-7),
]


def _load(name: str) -> np.ndarray:
    return np.loadtxt(NIST / f"{name}.csv", skiprows=1)


@pytest.mark.parametrize("name,mean,sd,sd_rtol", CERTIFIED)
def test_nist_certified_mean_and_sd(name, mean, sd, sd_rtol):
    """Mean and sd of each NIST StRD univariate set match the certified values."""
    m = compute_moments(_load(name))
    assert m.mean == pytest.approx(mean, rel=1e-14, abs=1e-14)
    assert m.sd == pytest.approx(sd, rel=sd_rtol)


def test_naive_formula_fails_numacc4_but_ours_does_not():
    """The one-pass formula breaks on NumAcc4 (NIST StRD NumAcc3 certified values); the corrected two-pass result does not."""
    x = _load("NumAcc4")
    n = x.shape[0]
    with np.errstate(invalid="ignore"):
        naive = np.sqrt((np.sum(x * x) - np.sum(x) ** 2 / n) / (n - 1))
    assert naive != pytest.approx(0.1, rel=1e-3)              # the check can tell good from bad
    assert compute_moments(x).sd == pytest.approx(0.1, rel=1e-7)


def test_segments_equal_single_lots():
    """Each segment of a concatenation gets exactly the moments it gets alone."""
    rng = np.random.default_rng(7)
    parts = [rng.normal(500, 3, size) for size in (0, 1, 2, 7, 50, 129, 1000)] + [_load("NumAcc4")]
    n, mean, var = segment_moments(np.concatenate(parts), np.array([len(p) for p in parts]))
    for j, p in enumerate(parts):
        one = compute_moments(p)
        assert n[j] == len(p)
        np.testing.assert_equal([mean[j], var[j]], [one.mean, one.var])


def test_degenerate_sizes():
    """n = 0 gives NaN mean; n = 1 gives NaN sd; constant values give sd exactly 0."""
    _, mean, var = segment_moments(np.array([3.0, 5.0, 5.0, 5.0]), np.array([0, 1, 3]))
    assert np.isnan(mean[0]) and np.isnan(var[0])
    assert mean[1] == 3.0 and np.isnan(var[1])
    assert mean[2] == 5.0 and var[2] == 0.0


def test_bad_input_is_refused():
    """Non-finite values and inconsistent lengths raise ValueError naming the problem."""
    with pytest.raises(ValueError, match="finite"):
        compute_moments([1.0, np.nan])
    with pytest.raises(ValueError, match="lengths"):
        segment_moments(np.ones(3), np.array([1, 1]))
