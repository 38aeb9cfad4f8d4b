"""Renders a `Report` into one self-contained HTML page (inline styles and SVG) with a sandboxed template."""

from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime
from importlib.resources import files

import jinja2
from jinja2.sandbox import SandboxedEnvironment

from monitor.alerts.templates import CAUTION, fmt_p
from monitor.giveaway import Giveaway, total_giveaway
from monitor.report.charts import GiveawayChart, HeadStrip, MeansChart, giveaway_chart, head_strip, means_chart
from monitor.report.model import ProductSection, Report, finite

TEMPLATE = "page.html.j2"


@dataclass(frozen=True)
class SectionView:
    """A section with what the page draws from it."""

    section: ProductSection
    anchor: str
    means: MeansChart
    giveaway: GiveawayChart
    heads: HeadStrip
    total: Giveaway | None
    unknown_giveaway: int


def _num(value: float | None, digits: int = 2) -> str:
    if not finite(value):
        return "—"
    return f"{float(value):.{digits}f}".replace("-", "−")  # type: ignore[arg-type]


def _signed(value: float | None, digits: int = 2) -> str:
    if not finite(value):
        return "—"
    v = float(value)  # type: ignore[arg-type]
    return ("+" if v > 0 else "") + f"{v:.{digits}f}".replace("-", "−")


def _when(value: datetime | None) -> str:
    return "—" if value is None else value.strftime("%Y-%m-%d %H:%M")


def _px(value: float) -> str:
    return f"{value:.1f}"


def _environment() -> SandboxedEnvironment:
    env = SandboxedEnvironment(autoescape=True, undefined=jinja2.StrictUndefined, trim_blocks=True,
                               lstrip_blocks=True)
    env.filters.update(num=_num, signed=_signed, when=_when, px=_px, p=fmt_p)
    return env


def _template() -> jinja2.Template:
    text = files("monitor.report").joinpath(TEMPLATE).read_text(encoding="utf-8")
    return _environment().from_string(text)


def section_view(section: ProductSection, index: int) -> SectionView:
    """The charts and totals of one section."""
    total, unknown = total_giveaway((r.giveaway, r.n) for r in section.lots)
    return SectionView(section=section, anchor=f"s{index}", means=means_chart(section),
                       giveaway=giveaway_chart(section), heads=head_strip(section), total=total,
                       unknown_giveaway=unknown)


def render_report(report: Report) -> str:
    """The report as one HTML document: no scripts, no external resources; every data value escaped."""
    views = [section_view(s, i) for i, s in enumerate(report.sections, 1)]
    totals = {
        "lots": sum(s.count_lots for s in report.sections),
        "holds": sum(s.count_holds for s in report.sections),
        "reviews": sum(s.count_reviews for s in report.sections),
        "open": sum(s.count_open for s in report.sections),
    }
    return _template().render(report=report, views=views, totals=totals, caution=CAUTION)
