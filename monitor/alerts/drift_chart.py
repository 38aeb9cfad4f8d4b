"""A small PNG chart for drift notices: the CUSUM sums (or the EWMA statistic) across lots with their limits."""

from __future__ import annotations

import io
import math
from collections.abc import Mapping, Sequence
from typing import Any

from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from matplotlib.ticker import MaxNLocator

MAX_LOT_LABELS = 12     # up to this many lots, each tick is labelled with its lot code
MAX_LABEL = 14          # characters of a lot code shown on a tick
MAX_MARKERS = 60        # up to this many lots, each point gets a dot


def _num(x: object) -> float:
    """``x`` as a float; NaN for anything that is not a finite number (left out of the plot)."""
    if isinstance(x, (int, float)) and not isinstance(x, bool) and math.isfinite(x):
        return float(x)
    return math.nan


def _label(code: object) -> str:
    """A lot code as one short line for a tick label."""
    text = " ".join(str(code).split())           # no line breaks in a tick label
    return text if len(text) <= MAX_LABEL else text[: MAX_LABEL - 1] + "…"


def _series(points: Sequence[Mapping[str, Any]], key: str) -> list[float]:
    """One chart value of every point (KeyError when a point lacks it)."""
    return [_num(p[key]) for p in points]


def render_drift_chart(data: Mapping[str, Any], *, title: str = "") -> bytes:
    """PNG bytes of the drift chart of ``data`` (``DriftSignal.to_json()``): CUSUM S+ and S- with h, or EWMA E
    with its ±limit curves, one point per lot since the last restart, the signalling (last) lot marked.

    Agg backend, no pyplot global state (safe in worker threads); text is never read as mathtext, so a lot
    code with ``$`` is drawn as written. Raises ValueError / KeyError / TypeError on a malformed payload."""
    method = data["method"]
    if method not in ("cusum", "ewma"):
        raise ValueError(f"drift chart: method must be cusum or ewma (got {method!r})")
    points = list(data["points"])
    if not points:
        raise ValueError("drift chart: no points")
    earlier = int(data.get("earlier_lots") or 0)
    x = [earlier + i + 1 for i in range(len(points))]
    marker = "o" if len(points) <= MAX_MARKERS else None
    upper, lower, limit = _series(points, "upper"), _series(points, "lower"), _series(points, "limit")

    fig = Figure(figsize=(6.4, 3.2), dpi=80)
    FigureCanvasAgg(fig)
    ax = fig.add_subplot(1, 1, 1)
    kw: dict[str, Any] = {"marker": marker, "markersize": 3, "linewidth": 1.0}
    if method == "cusum":
        ax.plot(x, upper, color="#b3261e", label="S+ (mean above target)", **kw)
        ax.plot(x, lower, color="#1f5fa8", label="S− (mean below target)", **kw)
        ax.plot(x, limit, color="#444444", linewidth=1.4, linestyle="--", label="decision limit h")
        ax.axhline(0.0, color="#999999", linewidth=0.6)
        hit = upper[-1] if data.get("direction") == "up" else lower[-1]
        ax.set_ylabel("cumulative sum")
    else:
        ax.plot(x, upper, color="#44546a", label="EWMA statistic E", **kw)
        ax.plot(x, limit, color="#444444", linewidth=1.2, linestyle="--", label="± limit")
        ax.plot(x, [-v for v in limit], color="#444444", linewidth=1.2, linestyle="--")
        ax.axhline(0.0, color="#1b7f3b", linewidth=0.8)
        hit = upper[-1]
        ax.set_ylabel("E (lot t / z units)")
    if math.isfinite(hit):
        ax.plot([x[-1]], [hit], linestyle="none", marker="D", markersize=8, markerfacecolor="none",
                markeredgecolor="#b3261e", markeredgewidth=1.6, label="signal")
    if len(points) <= MAX_LOT_LABELS:
        ax.set_xticks(x)
        ax.set_xticklabels([_label(p.get("lot", "")) for p in points], rotation=40, ha="right", fontsize=7,
                           parse_math=False)
        ax.set_xlabel("lot (oldest first)")
    else:
        ax.xaxis.set_major_locator(MaxNLocator(8, integer=True))
        ax.set_xlabel("lots since the chart's last restart")
    ax.yaxis.set_major_locator(MaxNLocator(5))
    if title:
        ax.set_title(title[:80], fontsize=10, parse_math=False)
    ax.legend(fontsize=7, loc="upper left")    # a fixed place: "best" costs more than the rest of the chart
    ax.grid(True, linewidth=0.3)
    fig.subplots_adjust(left=0.11, right=0.98, top=0.9, bottom=0.27 if len(points) <= MAX_LOT_LABELS else 0.16)
    buf = io.BytesIO()
    fig.savefig(buf, format="png")
    return buf.getvalue()
