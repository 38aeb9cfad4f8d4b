"""Units of fill quantity (mass and volume) and conversion between them."""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

# canonical name -> (kind, factor to the kind's base unit: g for mass, mL for volume)
# 1 oz (avoirdupois) = 28.349523125 g and 1 US fl oz = 29.5735295625 mL (NIST SP 811, appendix B).
UNITS: dict[str, tuple[str, float]] = {
    "mg": ("mass", 1e-3),
    "g": ("mass", 1.0),
    "kg": ("mass", 1e3),
    "oz": ("mass", 28.349523125),
    "mL": ("volume", 1.0),
    "L": ("volume", 1e3),
    "fl oz": ("volume", 29.5735295625),
}

_ALIASES = {
    "mg": "mg", "g": "g", "gram": "g", "grams": "g", "kg": "kg",
    "oz": "oz", "ml": "mL", "l": "L", "litre": "L", "liter": "L",
    "fl oz": "fl oz", "floz": "fl oz", "fl_oz": "fl oz", "fl.oz": "fl oz", "fl. oz": "fl oz",
}

ALLOWED = ", ".join(UNITS)


def canonical_unit(text: str) -> str | None:
    """Return the canonical spelling of a unit (``"ML"`` -> ``"mL"``), or None if unknown."""
    key = " ".join(str(text).strip().split()).lower()
    return _ALIASES.get(key)


def conversion_factor(src: str, dst: str, density: float | None = None) -> float:
    """Factor f such that value_in_dst = value_in_src * f.

    Mass <-> volume needs ``density`` in g/mL; without it a ValueError names what is missing.
    """
    s, d = canonical_unit(src), canonical_unit(dst)
    if s is None or d is None:
        bad = src if s is None else dst
        raise ValueError(f"unknown unit {bad!r}; allowed: {ALLOWED}")
    (skind, sf), (dkind, df) = UNITS[s], UNITS[d]
    if skind == dkind:
        return sf / df
    if density is None or not (density > 0):
        raise ValueError(f"converting {s} to {d} needs a density in g/mL (got {density!r})")
    # mass -> volume: g / (g/mL) = mL ; volume -> mass: mL * (g/mL) = g
    base = sf / density if skind == "mass" else sf * density
    return base / df


def factor_to_rule_unit(src: str, rule_unit: str, density: float | None = None) -> tuple[float, bool]:
    """Factor from a value's unit into the judging rule's unit, and whether the unit was assumed.

    ``src == ""`` means the value carried no unit (no unit column, no profile ``unit``): it is taken to be
    in the rule's unit (factor 1, assumed True). A rule without a unit (ad-hoc) takes the values as they
    are. Raises ValueError (naming the pair) when a declared unit cannot be converted.
    """
    if not src:
        return 1.0, True
    if not rule_unit:
        return 1.0, False
    return conversion_factor(src, rule_unit, density), False


@dataclass(frozen=True)
class RuleUnitFactor:
    """How values of one unit enter the judging rule's unit: the factor (NaN when they cannot), whether
    the unit was assumed, and the reason they cannot be judged (None when they can)."""

    factor: float
    assumed: bool
    problem: str | None = None


def to_rule_unit(src: str, rule_unit: str, density: float | None = None) -> RuleUnitFactor:
    """``factor_to_rule_unit`` that never raises: a pair that cannot be converted carries its ``problem``
    (``unit_problem``), the one wording ``check`` and the daemon give such a lot."""
    try:
        factor, assumed = factor_to_rule_unit(src, rule_unit, density)
    except ValueError as exc:
        return RuleUnitFactor(math.nan, False, unit_problem(src, rule_unit, exc))
    return RuleUnitFactor(factor, assumed)


def unit_problem(src: str, rule_unit: str, why: object) -> str:
    """Why values in ``src`` cannot be judged under a rule in ``rule_unit``."""
    return f"values in {src!r} cannot be judged in {rule_unit}: {why}"


def convert(values: np.ndarray, src: str, dst: str, density: float | None = None) -> np.ndarray:
    """Convert an array of quantities from unit ``src`` to ``dst``."""
    f = conversion_factor(src, dst, density)
    arr = np.asarray(values, dtype=np.float64)
    return arr if f == 1.0 else arr * f
