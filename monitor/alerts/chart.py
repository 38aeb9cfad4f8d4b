"""A small PNG chart of one lot for hold notices: values in arrival order with target, mean and interval lines."""

from __future__ import annotations

import io
import math
from collections.abc import Sequence

from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from matplotlib.ticker import MaxNLocator


def _finite(x: object) -> float | None:
    return float(x) if isinstance(x, (int, float)) and not isinstance(x, bool) and math.isfinite(x) else None


def render_chart(values: Sequence[float], *, target: float | None, mean: float | None,
                 ci_low: float | None = None, ci_high: float | None = None, unit: str = "",
                 title: str = "") -> bytes:
    """PNG bytes of the lot chart (Agg backend, no GUI, no pyplot global state; safe in worker threads).

    Non-finite values are left out of the plot; missing lines (None) are simply not drawn.
    """
    fig = Figure(figsize=(6.4, 3.0), dpi=80)
    FigureCanvasAgg(fig)
    ax = fig.add_subplot(1, 1, 1)
    pts = [(i + 1, float(v)) for i, v in enumerate(values) if _finite(v) is not None]
    if pts:
        ax.plot([p[0] for p in pts], [p[1] for p in pts], marker="o", markersize=3, linewidth=0.8,
                color="#44546a", label="values (arrival order)")
    t, m, lo, hi = (_finite(x) for x in (target, mean, ci_low, ci_high))
    if t is not None:
        ax.axhline(t, color="#1b7f3b", linewidth=1.6, label=f"target {t:g}")
    if m is not None:
        ax.axhline(m, color="#b3261e", linewidth=1.2, linestyle="--", label=f"mean {m:.2f}")
    if lo is not None and hi is not None:
        ax.axhspan(lo, hi, color="#b3261e", alpha=0.12, label="confidence interval")
    elif lo is not None or hi is not None:
        bound = lo if lo is not None else hi
        assert bound is not None
        ax.axhline(bound, color="#b3261e", linewidth=0.8, linestyle=":", label="confidence bound")
    ax.set_xlabel("measurement (arrival order)")
    ax.set_ylabel(unit or "value")
    if title:
        ax.set_title(title[:80], fontsize=10)
    ax.xaxis.set_major_locator(MaxNLocator(6, integer=True))
    ax.yaxis.set_major_locator(MaxNLocator(5))
    ax.legend(fontsize=7, loc="upper right")   # a fixed place: "best" costs more than the rest of the chart
    ax.grid(True, linewidth=0.3)
    fig.subplots_adjust(left=0.11, right=0.98, top=0.9, bottom=0.16)
    buf = io.BytesIO()
    fig.savefig(buf, format="png")
    return buf.getvalue()
