"""Average-quantity screen: TNE table, mean criterion factors, T1/T2 counts against published values."""

from __future__ import annotations

import numpy as np
import pytest

from monitor.quantity import allowed_below_t1, screen_average_quantity, tolerable_negative_error


@pytest.mark.parametrize("nominal,tne", [
    # Council Directive 76/211/EEC Annex I table; percentages rounded up to 0.1 g (published in the German
    # transposition; ../shared/REFERENCES.md §6 "computed examples")
    (30, 2.7), (125, 5.7), (250, 9.0), (330, 9.9), (750, 15.0), (1500, 22.5),
    # band edges meet (50·9 % = 4.5, 100·4.5 % = 4.5, 200·4.5 % = 9, 300·3 % = 9, 500·3 % = 15, 1000·1.5 % = 15)
    (50, 4.5), (100, 4.5), (200, 9.0), (300, 9.0), (500, 15.0), (1000, 15.0),
    # above 10 kg: 150 g to 15 kg, then 1 % (published in the New Zealand regulations; memory for OIML R 87)
    (12000, 150.0), (20000, 200.0),
])
def test_tne_table(nominal: float, tne: float) -> None:
    """TNE by nominal quantity equals the published table."""
    assert tolerable_negative_error(nominal) == pytest.approx(tne, abs=1e-12)


def test_tne_below_5_is_refused() -> None:
    """The table starts at 5 g or mL; smaller nominals raise."""
    with pytest.raises(ValueError):
        tolerable_negative_error(4.0)


@pytest.mark.parametrize("n,factor", [(20, 0.640), (30, 0.503), (50, 0.379), (80, 0.295)])
def test_mean_criterion_factor(n: int, factor: float) -> None:
    """Qn − mean_limit equals t(0.995, n−1)/√n · s; sample correction factors as listed in
    ../shared/REFERENCES.md §6 (SI 2006/659 Schedule 2; 30 and 80 as published in the New Zealand
    regulations), compared at half a unit of the last printed decimal."""
    rng = np.random.default_rng(n)
    x = rng.standard_normal(n)
    x = (x - x.mean()) / x.std(ddof=1)  # s = 1 exactly
    r = screen_average_quantity(500 + x, 500.0)
    assert 500.0 - r.mean_limit == pytest.approx(factor, abs=0.5e-3)


def test_sampling_plan_acceptance_numbers() -> None:
    """Packs below T1 accepted: 3 of 50, 5 of 80, 7 of 125 (SI 2006/659, published); 1 of 20 destructive
    (Directive Annex II, published)."""
    assert [allowed_below_t1(n) for n in (50, 80, 125, 20)] == [3, 5, 7, 1]


def test_t1_t2_counts_and_outcome() -> None:
    """A pack short by more than 2·TNE fails the screen; counts are by the TNE limits (T1 = Qn − TNE,
    T2 = Qn − 2·TNE: Council Directive 76/211/EEC Annex I, published; ../shared/REFERENCES.md §6)."""
    values = np.full(50, 505.0)
    values[:2] = 500 - 16.0       # below T1 (485) but above T2 (470)
    r = screen_average_quantity(values, 500.0)
    assert (r.below_t1, r.below_t2, r.passed) == (2, 0, True)
    values[2] = 500 - 31.0        # below T2
    r = screen_average_quantity(values, 500.0)
    assert r.below_t2 == 1 and not r.passed and "2×TNE" in r.reason
