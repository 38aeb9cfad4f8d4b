"""Plain-words formatting of statistical numbers for verdict reasons (p-values, quantities, powers)."""

from __future__ import annotations

import math

__all__ = ["format_p", "format_quantity", "format_statistic", "quantity_decimals"]


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
