"""The drift charts against the NIST/SEMATECH e-Handbook recursions, written out here independently."""

from __future__ import annotations

import math

import numpy as np
import pytest

from monitor.stats.drift import DriftState, cusum_step, ewma_limit, ewma_step, run, step


def _cusum_reference(z: list[float], k: float, h: float) -> list[tuple[float, float, str | None]]:
    """Tabular two-sided CUSUM, NIST/SEMATECH e-Handbook of Statistical Methods §6.3.2.3:
    S+_i = max(0, S+_{i-1} + z_i - k), S-_i = max(0, S-_{i-1} - z_i - k); a signal when either exceeds h;
    both restart at 0 after a signal (the restart is the issue's rule)."""
    hi = lo = 0.0
    out = []
    for x in z:
        hi = max(0.0, hi + x - k)
        lo = max(0.0, lo - x - k)
        sig = "up" if hi > h else "down" if lo > h else None
        out.append((hi, lo, sig))
        if sig:
            hi = lo = 0.0
    return out


def _ewma_reference(z: list[float], lam: float, L: float) -> list[tuple[float, float, str | None]]:
    """EWMA, e-Handbook §6.3.2.4: E_i = lam z_i + (1 - lam) E_{i-1}, E_0 = 0; limits
    ±L sqrt(lam/(2-lam) (1 - (1-lam)^(2i))) with i counted from the last restart."""
    e, i = 0.0, 0
    out = []
    for x in z:
        i += 1
        e = lam * x + (1 - lam) * e
        lim = L * math.sqrt(lam / (2 - lam) * (1 - (1 - lam) ** (2 * i)))
        sig = "up" if e > lim else "down" if e < -lim else None
        out.append((e, lim, sig))
        if sig:
            e, i = 0.0, 0
    return out


@pytest.mark.parametrize("seed,shift", [(1, 0.0), (2, 0.6), (3, -0.8), (4, 1.5)])
def test_cusum_follows_the_handbook_recursion(seed: int, shift: float) -> None:
    """S+, S- and every signal equal the e-Handbook §6.3.2.3 recursion over 400 lots (k = 0.5, h = 5)."""
    z = list(np.random.default_rng(seed).normal(shift, 1.0, 400))
    _, points = run(z, method="cusum", k=0.5, h=5.0)
    ref = _cusum_reference(z, 0.5, 5.0)
    for p, (hi, lo, sig) in zip(points, ref, strict=True):
        assert p.upper == pytest.approx(hi, rel=1e-12, abs=1e-12)
        assert p.lower == pytest.approx(lo, rel=1e-12, abs=1e-12)
        assert p.signal == sig
    if shift:
        assert any(s for *_x, s in ref)


@pytest.mark.parametrize("seed,shift,lam,L", [(5, 0.0, 0.2, 3.0), (6, 0.7, 0.2, 3.0), (7, -0.5, 0.1, 2.7),
                                              (8, 1.0, 1.0, 3.0)])
def test_ewma_follows_the_handbook_recursion(seed: int, shift: float, lam: float, L: float) -> None:
    """E_i, its time-varying limit and every signal equal the e-Handbook §6.3.2.4 recursion."""
    z = list(np.random.default_rng(seed).normal(shift, 1.0, 400))
    _, points = run(z, method="ewma", lam=lam, L=L)
    for p, (e, lim, sig) in zip(points, _ewma_reference(z, lam, L), strict=True):
        assert p.upper == pytest.approx(e, rel=1e-12, abs=1e-12)
        assert p.limit == pytest.approx(lim, rel=1e-12)
        assert p.signal == sig


def test_ewma_limit_tends_to_the_steady_state_width() -> None:
    """The limit grows to L sqrt(lam / (2 - lam)) (e-Handbook §6.3.2.4, the asymptotic limit); at i = 1 it is
    L * lam (the variance of lam z_1 is lam^2)."""
    assert ewma_limit(10_000, lam=0.2, L=3.0) == pytest.approx(3.0 * math.sqrt(0.2 / 1.8), rel=1e-12)
    assert ewma_limit(1, lam=0.2, L=3.0) == pytest.approx(3.0 * 0.2, rel=1e-12)
    assert ewma_limit(1, lam=1.0, L=3.0) == 3.0


def test_a_signal_needs_the_limit_exceeded_not_reached() -> None:
    """'Exceeds h': S+ exactly h is no signal; just above it is (the issue's wording)."""
    s, p = cusum_step(DriftState(), 5.5, k=0.5, h=5.0)
    assert p.upper == 5.0 and p.signal is None and s.upper == 5.0
    s, p = cusum_step(DriftState(), 5.5 + 1e-9, k=0.5, h=5.0)
    assert p.signal == "up" and s == DriftState()


def test_a_downward_signal_tells_s_minus_and_restarts() -> None:
    """A run of low lots signals "down" with S- as the statistic; the chart starts again at zero."""
    z = [-1.5, -2.0, -1.8, -1.2]           # S- = 1.0, 2.5, 3.8, 4.5; h = 4 -> signal at the 4th lot
    s, points = run(z, method="cusum", k=0.5, h=4.0)
    assert [p.signal for p in points] == [None, None, None, "down"]
    assert points[-1].statistic == pytest.approx(4.5) and points[-1].signed_limit == 4.0
    assert s == DriftState()


def test_ewma_down_signal_gives_the_negative_limit() -> None:
    """EWMA below -limit: direction down, statistic E (negative), limit -limit_i."""
    _, p = ewma_step(DriftState(), -4.0, lam=1.0, L=3.0)
    assert (p.signal, p.statistic, p.signed_limit) == ("down", -4.0, -3.0)


def test_unknown_method_is_refused() -> None:
    with pytest.raises(ValueError, match="cusum, ewma"):
        step(DriftState(), 0.0, method="shewhart")
