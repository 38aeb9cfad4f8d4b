"""Pure statistics for lot screening: stable moments, t / z / Wilcoxon tests, Shapiro–Wilk, power."""

from monitor.stats.location import (
    ALTERNATIVES,
    LocationTest,
    critical_value,
    t_test,
    t_test_arrays,
    z_test,
    z_test_arrays,
)
from monitor.stats.moments import Moments, compute_moments, segment_moments
from monitor.stats.normality import ShapiroWilk, shapiro_coefficients, shapiro_wilk, shapiro_wilk_rows
from monitor.stats.power import n_for_power, plan_sample_size, power, power_curve
from monitor.stats.wilcoxon import wilcoxon_test

__all__ = [
    "ALTERNATIVES", "LocationTest", "Moments", "ShapiroWilk", "compute_moments", "critical_value", "n_for_power",
    "plan_sample_size", "power", "power_curve", "segment_moments", "shapiro_coefficients", "shapiro_wilk",
    "shapiro_wilk_rows", "t_test", "t_test_arrays", "wilcoxon_test", "z_test", "z_test_arrays",
]
