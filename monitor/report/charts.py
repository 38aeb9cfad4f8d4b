"""Chart geometry for the report page: scales, ticks and shapes as plain numbers; the template draws the SVG."""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

from monitor.report.model import ProductSection, finite

WIDTH = 760.0
LEFT, RIGHT, TOP = 64.0, 20.0, 26.0
MEANS_HEIGHT, MEANS_BOTTOM = 270.0, 70.0
GIVE_HEIGHT, GIVE_BOTTOM = 150.0, 24.0
CELL_H, HEAD_LABEL = 24.0, 64.0
UNDER, OVER, MIDDLE = (38, 96, 164), (190, 82, 24), (247, 245, 240)


@dataclass(frozen=True)
class Tick:
    y: float
    label: str


@dataclass(frozen=True)
class LotMark:
    """One lot in the means chart: x, the mean's y (None: unknown) and the interval's ends (open end: edge)."""

    x: float
    code: str
    verdict: str
    y_mean: float | None
    y_low: float | None
    y_high: float | None
    low_open: bool
    high_open: bool
    label: str                          # lot code shortened for the axis
    title: str                          # full text of the hover tip


@dataclass(frozen=True)
class MeansChart:
    width: float
    height: float
    left: float
    right: float
    top: float
    bottom: float
    ticks: tuple[Tick, ...]
    y_target: float
    y_nominal: float | None
    marks: tuple[LotMark, ...]
    step: float


@dataclass(frozen=True)
class Bar:
    x: float
    y: float
    w: float
    h: float
    under: bool
    title: str


@dataclass(frozen=True)
class GiveawayChart:
    width: float
    height: float
    left: float
    right: float
    top: float
    bottom: float
    y_zero: float
    ticks: tuple[Tick, ...]
    bars: tuple[Bar, ...]


@dataclass(frozen=True)
class Cell:
    x: float
    w: float
    fill: str
    text: str
    dark: bool
    title: str


@dataclass(frozen=True)
class HeadRow:
    head: str
    y: float
    cells: tuple[Cell, ...]
    mean_offset: float | None
    change: float | None              # least-squares change of the offset from the first lot to the last
    flagged: bool                     # the head whose offset changed most across the period


@dataclass(frozen=True)
class HeadStrip:
    width: float
    height: float
    left: float
    rows: tuple[HeadRow, ...]
    cell_h: float
    scale: float                      # |offset| that gets the full colour


def nice_step(span: float, count: int = 5) -> float:
    """A 1-2-5 step that cuts ``span`` into about ``count`` parts."""
    if not (span > 0 and math.isfinite(span)):
        return 1.0
    raw = span / count
    mag = 10.0 ** math.floor(math.log10(raw))
    return next(m * mag for m in (1.0, 2.0, 2.5, 5.0, 10.0) if m * mag >= raw)


def _decimals(step: float) -> int:
    """Decimals that show every multiple of a 1-2-2.5-5 step exactly (0.25 → 2, 2.5 → 1, 20 → 0)."""
    mag = math.floor(math.log10(step) + 1e-9)
    extra = 1 if abs(step / 10.0 ** mag - 2.5) < 1e-9 else 0
    return max(0, -mag + extra)


def _ticks(lo: float, hi: float, to_y: Scale) -> tuple[Tick, ...]:
    step = nice_step(hi - lo)
    digits = _decimals(step)
    first = math.ceil(lo / step - 1e-9)
    out = []
    k = first
    while k * step <= hi + 1e-9 * step:
        v = k * step
        out.append(Tick(to_y(v), f"{v:.{digits}f}".replace("-", "−") if v != 0 else f"{0:.{digits}f}"))
        k += 1
    return tuple(out)


@dataclass(frozen=True)
class Scale:
    """Linear map from values [lo, hi] to pixels [bottom, top] (SVG y grows downward)."""

    lo: float
    hi: float
    px_bottom: float
    px_top: float

    def __call__(self, v: float) -> float:
        return self.px_bottom - (v - self.lo) / (self.hi - self.lo) * (self.px_bottom - self.px_top)


def _domain(values: Sequence[float], pad: float = 0.08) -> tuple[float, float]:
    vs = [float(v) for v in values if finite(v)]
    if not vs:
        return -1.0, 1.0
    lo, hi = min(vs), max(vs)
    if hi - lo <= 1e-12 * max(1.0, abs(hi)):
        half = max(abs(hi) * 0.01, 1.0)
        return lo - half, hi + half
    span = hi - lo
    return lo - pad * span, hi + pad * span


def _x_positions(count: int) -> tuple[float, list[float]]:
    plot = WIDTH - LEFT - RIGHT
    step = plot / max(count, 1)
    return step, [LEFT + (i + 0.5) * step for i in range(count)]


def _short(code: str, limit: int = 12) -> str:
    return code if len(code) <= limit else code[: limit - 1] + "…"


def _fmt(v: float | None, digits: int = 2) -> str:
    return "—" if not finite(v) else f"{float(v):.{digits}f}".replace("-", "−")  # type: ignore[arg-type]


def means_chart(section: ProductSection) -> MeansChart:
    """Lot means in time order with each lot's interval, target and nominal lines."""
    lots = section.lots
    values: list[float] = [lots[0].target] if lots else [0.0]
    for r in lots:
        values += [v for v in (r.mean, r.ci_low, r.ci_high, r.target, r.nominal) if finite(v)]  # type: ignore[misc]
    lo, hi = _domain(values)
    top, bottom = TOP, MEANS_HEIGHT - MEANS_BOTTOM
    scale = Scale(lo, hi, bottom, top)
    step, xs = _x_positions(len(lots))
    marks = []
    for x, r in zip(xs, lots, strict=True):
        y_mean = scale(r.mean) if finite(r.mean) else None  # type: ignore[arg-type]
        has_interval = y_mean is not None and (finite(r.ci_low) or finite(r.ci_high))
        y_low = (scale(r.ci_low) if finite(r.ci_low) else bottom) if has_interval else None  # type: ignore[arg-type]
        y_high = (scale(r.ci_high) if finite(r.ci_high) else top) if has_interval else None  # type: ignore[arg-type]
        title = (f"{r.lot} · {r.verdict} · n {r.n} · mean {_fmt(r.mean)} {r.unit} · interval "
                 f"{_fmt(r.ci_low) if finite(r.ci_low) else 'open'} to "
                 f"{_fmt(r.ci_high) if finite(r.ci_high) else 'open'}")
        marks.append(LotMark(x=x, code=r.lot, verdict=r.verdict, y_mean=y_mean, y_low=y_low, y_high=y_high,
                             low_open=has_interval and not finite(r.ci_low),
                             high_open=has_interval and not finite(r.ci_high), label=_short(r.lot), title=title))
    target = lots[0].target if lots else 0.0
    nominal = next((r.nominal for r in lots if finite(r.nominal)), None)
    return MeansChart(width=WIDTH, height=MEANS_HEIGHT, left=LEFT, right=WIDTH - RIGHT, top=top, bottom=bottom,
                      ticks=_ticks(lo, hi, scale), y_target=scale(target),
                      y_nominal=scale(nominal) if nominal is not None else None, marks=tuple(marks), step=step)


def giveaway_chart(section: ProductSection) -> GiveawayChart:
    """Giveaway per pack of each lot as a bar above (over-filled) or below (under-filled) zero."""
    lots = section.lots
    per = [r.giveaway.per_pack if r.giveaway is not None else None for r in lots]
    lo, hi = _domain([0.0, *[p for p in per if p is not None]], pad=0.1)
    lo, hi = min(lo, 0.0), max(hi, 0.0)
    top, bottom = TOP, GIVE_HEIGHT - GIVE_BOTTOM
    scale = Scale(lo, hi, bottom, top)
    step, xs = _x_positions(len(lots))
    w = min(step * 0.6, 40.0)
    zero = scale(0.0)
    bars = []
    for x, r, p in zip(xs, lots, per, strict=True):
        if p is None or r.giveaway is None:
            continue
        y = scale(p)
        total = f"{_fmt(r.giveaway.total, 1)} {r.unit} in the lot"
        bars.append(Bar(x=x - w / 2, y=min(y, zero), w=w, h=max(abs(zero - y), 0.75), under=p < 0,
                        title=f"{r.lot}: {_fmt(p)} {r.unit} per pack, {total}"))
    return GiveawayChart(width=WIDTH, height=GIVE_HEIGHT, left=LEFT, right=WIDTH - RIGHT, top=top, bottom=bottom,
                         y_zero=zero, ticks=_ticks(lo, hi, scale), bars=tuple(bars))


def _mix(a: tuple[int, int, int], b: tuple[int, int, int], t: float) -> str:
    t = min(max(t, 0.0), 1.0)
    return "#" + "".join(f"{round(x + (y - x) * t):02x}" for x, y in zip(a, b, strict=True))


def _change(points: Sequence[tuple[int, float]]) -> float | None:
    """Least-squares slope of offset on lot index, times the index span (first lot to last)."""
    if len(points) < 2:
        return None
    xs = [float(i) for i, _ in points]
    ys = [v for _, v in points]
    mx = math.fsum(xs) / len(xs)
    my = math.fsum(ys) / len(ys)
    sxx = math.fsum((x - mx) ** 2 for x in xs)
    if sxx == 0:
        return None
    slope = math.fsum((x - mx) * (y - my) for x, y in zip(xs, ys, strict=True)) / sxx
    return slope * (max(xs) - min(xs))


def head_strip(section: ProductSection) -> HeadStrip:
    """Per filler head (rows) and lot (columns), the head's offset from target as a colour: blue under,
    rust over; the head whose offset changed most across the period is flagged."""
    lots = section.lots
    heads = section.heads
    offsets = [[h.offset for h in r.heads if finite(h.offset)] for r in lots]
    scale = max((abs(float(v)) for row in offsets for v in row), default=0.0)  # type: ignore[arg-type]
    step, xs = _x_positions(len(lots))
    rows: list[HeadRow] = []
    for k, head in enumerate(heads):
        cells: list[Cell] = []
        points: list[tuple[int, float]] = []
        for i, (x, r) in enumerate(zip(xs, lots, strict=True)):
            found = next((h for h in r.heads if h.head == head), None)
            if found is None or not finite(found.offset):
                cells.append(Cell(x=x - step / 2, w=step, fill="#ffffff", text="", dark=False,
                                  title=f"{head} · {r.lot}: no packs"))
                continue
            off = float(found.offset)  # type: ignore[arg-type]
            points.append((i, off))
            t = abs(off) / scale if scale > 0 else 0.0
            cells.append(Cell(x=x - step / 2, w=step, fill=_mix(MIDDLE, UNDER if off < 0 else OVER, t),
                              text=_fmt(off, 1) if step >= 34 else "", dark=t > 0.55,
                              title=f"{head} · {r.lot}: {_fmt(off)} {r.unit} from target, n {found.n}"))
        mean = math.fsum(v for _, v in points) / len(points) if points else None
        rows.append(HeadRow(head=head, y=4.0 + k * CELL_H, cells=tuple(cells), mean_offset=mean,
                            change=_change(points), flagged=False))
    changes = [abs(r.change) for r in rows if r.change is not None]
    if changes and max(changes) > 0:
        worst = max(changes)
        rows = [HeadRow(head=r.head, y=r.y, cells=r.cells, mean_offset=r.mean_offset, change=r.change,
                        flagged=r.change is not None and abs(r.change) == worst) for r in rows]
    return HeadStrip(width=WIDTH, height=8.0 + len(rows) * CELL_H, left=LEFT, rows=tuple(rows), cell_h=CELL_H,
                     scale=scale)

