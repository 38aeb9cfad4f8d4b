"""Plain-words formatting of statistical numbers for verdict reasons (p-values, quantities, powers)."""

from __future__ import annotations

import math
from collections.abc import Mapping

__all__ = ["EXCLUSION_WORDS", "format_excluded", "format_p", "format_quantity", "format_statistic", "plural",
           "quantity_decimals"]

# plain words for the reasons a row of a lot carries no usable value (monitor.lot.EXCLUSION_REASONS)
EXCLUSION_WORDS = {"blank": "blank", "not_a_number": "not a number", "not_finite": "not finite",
                   "dropped_value": "listed in drop_values"}


def format_p(p: float, alpha: float) -> str:
    """``p = 0.0012 < 0.05`` / ``p = 0.41 ≥ 0.05``: two significant digits, more if rounding would blur
    which side of alpha p is on.

    Examples
    --------
    >>> format_p(0.0012345, 0.05), format_p(0.4149, 0.05), format_p(0.04996, 0.05), format_p(1e-9, 0.05)
    ('p = 0.0012 < 0.05', 'p = 0.41 ≥ 0.05', 'p = 0.04996 < 0.05', 'p < 0.0001')
    """
    side = "<" if p < alpha else "≥"
    a = f"{alpha:g}"
    if p < 1e-4 < alpha:
        return "p < 0.0001"
    for digits in (2, 3, 4, 6, 10):
        text = f"{p:.{digits}g}"
        shown = float(text)
        if (shown < alpha) == (p < alpha) and (shown != alpha or p == alpha):
            break
    return f"p = {text} {side} {a}"


def quantity_decimals(sd: float | None) -> int:
    """Decimals that show a quantity one digit finer than its spread (0 to 6).

    Examples
    --------
    >>> quantity_decimals(2.3), quantity_decimals(0.04), quantity_decimals(None)
    (1, 3, 2)
    """
    if sd is None or not math.isfinite(sd) or sd <= 0:
        return 2
    return max(0, min(6, 1 - math.floor(math.log10(sd))))


def format_statistic(v: float) -> str:
    """A test statistic: two decimals, three significant digits when large.

    Examples
    --------
    >>> format_statistic(-3.2049), format_statistic(5519116531541.0)
    ('-3.20', '5.52e+12')
    """
    return f"{v:.2f}" if abs(v) < 1000 else f"{v:.3g}"


def format_quantity(v: float, decimals: int, strip: bool = True) -> str:
    """A quantity with ``decimals`` decimals (trailing zeros dropped if ``strip``); 10 digits when huge.

    Examples
    --------
    >>> format_quantity(497.2049, 1), format_quantity(500.0, 1), format_quantity(342.01, 1, strip=False)
    ('497.2', '500', '342.0')
    >>> format_quantity(1e9 + 0.25, 3)
    '1000000000'
    """
    if not math.isfinite(v):
        return str(v)
    if abs(v) >= 1e7:
        return f"{v:.10g}"
    text = f"{v:.{decimals}f}"
    if strip and "." in text:
        text = text.rstrip("0").rstrip(".")
    return "0" if text in ("-0", "") else text


def plural(count: int, word: str, many: str | None = None) -> str:
    """``1 row`` / ``3 rows``: the count with the word in the right number.

    Examples
    --------
    >>> plural(1, "row"), plural(3, "row"), plural(0, "unit"), plural(2, "value of", "values of")
    ('1 row', '3 rows', '0 units', '2 values of')
    """
    return f"{count} {word if count == 1 else (many or word + 's')}"


def format_excluded(counts: Mapping[str, int]) -> str:
    """How many rows of a lot were left out for want of a usable value, and why, in plain words.

    ``counts`` maps each reason (``EXCLUSION_WORDS`` keys; others are shown as given) to its count; the
    reasons are listed in the mapping's order, zero counts left out.

    Examples
    --------
    >>> format_excluded({"blank": 2, "not_a_number": 1, "not_finite": 0, "dropped_value": 0})
    '3 rows without a usable value left out (2 blank, 1 not a number)'
    >>> format_excluded({"blank": 0, "not_a_number": 0, "not_finite": 0, "dropped_value": 1})
    '1 row without a usable value left out (1 listed in drop_values)'
    """
    total = sum(counts.values())
    why = ", ".join(f"{k} {EXCLUSION_WORDS.get(r, r.replace('_', ' '))}" for r, k in counts.items() if k)
    return f"{plural(total, 'row')} without a usable value left out" + (f" ({why})" if why else "")
