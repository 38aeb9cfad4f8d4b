"""The report page as text: data escaped, nothing external, the caution, counts and chart geometry."""

from __future__ import annotations

import re
from dataclasses import replace
from datetime import UTC, datetime, timedelta
from importlib.resources import files

import pytest
from jinja2.sandbox import SandboxedEnvironment

from monitor.report import render_report
from monitor.report.charts import head_strip, means_chart, nice_step
from monitor.report.model import Disposition, LotRow, ProductSection, Report, RuleText
from monitor.report.render import _environment

from .brackenfield_scenario import START, make_report

EVIL = "<script>alert(1)</script>"


def test_data_values_are_escaped_everywhere() -> None:
    report = make_report(first_oat_code=EVIL)
    section = report.sections[0]
    lots = (replace(section.lots[5], disposition=Disposition("release", EVIL, f"note {EVIL}", START)),
            *section.lots[:5], *section.lots[6:])
    section = replace(section, lots=lots, rules=(RuleText(EVIL, "3", f'</pre>{EVIL}'),))
    html = render_report(replace(report, plant=EVIL, sections=(section, *report.sections[1:])))
    assert EVIL not in html
    assert "<script" not in html                      # the page has no script of its own either
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in html
    assert html.count("&lt;script&gt;") >= 6         # title, header, table, chart tip, rule, disposition


def test_nothing_outside_the_file_is_referenced() -> None:
    html = render_report(make_report())
    for needle in ("http://", "https://", "url(", "@import", "<link", "<img", "<iframe", " src=", "<script"):
        assert needle not in html, needle


def test_caution_is_on_the_page() -> None:
    html = render_report(make_report())
    text = re.sub(r"\s+", " ", html)
    assert "net-quantity compliance is decided under local weights-and-measures law by the competent authority" in text


def test_counts_of_the_scenario() -> None:
    # Hand-counted from the invented scenario in conftest.py: line L1 has 8 lots, L1-2611-06 and -07 held
    # (-06 released), -08 in review; line L2 has 3 passes.
    oats, porridge = make_report().sections
    assert (oats.count_lots, oats.count_holds, oats.count_reviews, oats.count_open) == (8, 2, 1, 2)
    assert (porridge.count_lots, porridge.count_holds, porridge.count_reviews, porridge.count_open) == (3, 0, 0, 0)
    html = render_report(make_report())
    assert html.count('<section class="product"') == 2
    assert len(re.findall(r'<g class="lot hold"', html)) == 2


def test_lots_are_kept_in_time_order() -> None:
    lots = make_report().sections[0].lots
    section = ProductSection(line="L1", product="p", unit="g", lots=tuple(reversed(lots)))
    assert [r.lot for r in section.lots] == [f"L1-2611-0{i}" for i in range(1, 9)]


def test_records_refuse_bad_values() -> None:
    row = make_report().sections[0].lots[0]
    with pytest.raises(ValueError, match="verdict"):
        replace(row, verdict="fail")
    with pytest.raises(ValueError, match="time zone"):
        replace(row, decided_at=datetime(2026, 11, 30, 6, 0))
    with pytest.raises(ValueError, match="action"):
        Disposition("approve", "x", "y", START)
    with pytest.raises(ValueError, match="period"):
        Report(plant="p", config_name="c", period_start=START, period_end=START - timedelta(hours=1),
               generated_at=START, sections=())


def test_means_chart_places_values_in_order() -> None:
    section = make_report().sections[0]
    chart = means_chart(section)
    by_code = {m.code: m.y_mean for m in chart.marks}
    first, last = by_code["L1-2611-01"], by_code["L1-2611-07"]
    assert chart.y_nominal is not None and first is not None and last is not None
    assert chart.y_target < chart.y_nominal                           # 502 above 500 on screen
    assert first < chart.y_target               # 502.31 above target
    assert chart.y_target < last < chart.y_nominal   # 500.12 between them
    assert all(m.low_open and not m.high_open for m in chart.marks)   # the scenario's intervals are (−∞, upper]
    xs = [m.x for m in chart.marks]
    assert xs == sorted(xs)


def test_the_drifting_head_is_flagged() -> None:
    # The invented scenario moves H4 by −1 g per lot; the other heads stay within ±1.1 g.
    strip = head_strip(make_report().sections[0])
    assert [r.head for r in strip.rows] == ["H1", "H2", "H3", "H4", "H5", "H6"]
    assert [r.head for r in strip.rows if r.flagged] == ["H4"]
    h4 = next(r for r in strip.rows if r.head == "H4")
    assert h4.change == pytest.approx(-7.0)        # −1 g per lot over 7 steps (least-squares slope of a line)


@pytest.mark.parametrize(("span", "step"), [(10.0, 2.0), (1.0, 0.2), (3.3, 1.0), (0.012, 0.0025), (700.0, 200.0)])
def test_nice_steps(span: float, step: float) -> None:
    # The 1-2-2.5-5 × 10^k axis steps, smallest at least span/5 (common practice, no source).
    assert nice_step(span) == pytest.approx(step)


def test_a_lot_without_a_mean_and_an_empty_report_render() -> None:
    row = make_report().sections[1].lots[0]
    blank = replace(row, lot="L2-EMPTY", n=0, mean=None, ci_low=None, ci_high=None, p_value=None, verdict="review",
                    reason="no values", giveaway=None)
    report = make_report()
    section = replace(report.sections[1], lots=(*report.sections[1].lots, blank))
    html = render_report(replace(report, sections=(section,)))
    assert "L2-EMPTY" in html and "1 lot(s) without a known mean left out" in html
    tz = UTC
    empty = Report(plant="p", config_name="c", period_start=datetime(2026, 1, 1, tzinfo=tz),
                   period_end=datetime(2026, 1, 2, tzinfo=tz), generated_at=datetime(2026, 1, 2, tzinfo=tz),
                   sections=())
    assert "No lot was decided in this period." in render_report(empty)


def test_template_is_a_shipped_file_and_the_environment_is_sandboxed() -> None:
    assert files("monitor.report").joinpath("page.html.j2").is_file()
    env = _environment()
    assert isinstance(env, SandboxedEnvironment)
    assert env.autoescape is True


def test_lot_row_is_frozen() -> None:
    row: LotRow = make_report().sections[0].lots[0]
    with pytest.raises(AttributeError):
        row.lot = "x"  # type: ignore[misc]


def test_drift_signals_of_a_section_are_listed_and_escaped() -> None:
    """A section's drift signals get their own table (series, method, direction, lot, statistic against limit,
    lots); a section without signals has none; a hostile lot code is escaped."""
    from monitor.report.model import DriftMark

    report = make_report()
    oats = report.sections[0]
    marks = (DriftMark(at=START, lot=EVIL, head="H3", method="cusum", direction="up", statistic=5.25, limit=5.0,
                       lots=7),)
    html = render_report(replace(report, sections=(replace(oats, drift=marks), *report.sections[1:])))
    assert html.count("<h3>Drift across lots</h3>") == 1
    row = re.search(r'<tr class="drift up">(.*?)</tr>', html, re.S)
    assert row is not None
    cells = [re.sub(r"<[^>]+>", "", c).strip() for c in re.findall(r"<td>(.*?)</td>", row.group(1), re.S)]
    assert cells[1:] == ["head H3", "cusum", "up", "&lt;script&gt;alert(1)&lt;/script&gt;", "5.25", "5.00", "7"]
    assert EVIL not in html
