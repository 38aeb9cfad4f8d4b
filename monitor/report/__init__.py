"""The report page: frozen records of a period's lots (model) rendered as one self-contained HTML file."""

from monitor.report.model import Disposition, HeadOffset, LotRow, ProductSection, Report, RuleText
from monitor.report.render import render_report

__all__ = ["Disposition", "HeadOffset", "LotRow", "ProductSection", "Report", "RuleText", "render_report"]
