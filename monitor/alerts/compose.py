"""Builds the e-mail for one batch of alerts: rendered templates, cleaned headers, stable Message-ID, charts."""

from __future__ import annotations

import logging
from datetime import UTC, datetime
from email.message import EmailMessage
from email.utils import format_datetime
from typing import Any

from monitor.alerts.alert import Alert
from monitor.alerts.chart import render_chart
from monitor.alerts.drift_chart import render_drift_chart
from monitor.alerts.headers import NOTICE_POLICY, clean_header_text, message_id
from monitor.alerts.templates import CAUTION, RenderedMessage, TemplateSet, message_context
from monitor.errors import TemplateError

log = logging.getLogger("monitor.alerts")
CHART_KINDS = ("hold", "verdict-changed")
MAX_CHARTS = 10     # charts per message: a grouped message of 50 holds stays small and quick to build


def chart_for(alert: Alert) -> bytes | None:
    """The PNG chart of a held (or re-judged) lot, or of a drift signal (its chart across lots); None when
    the alert carries nothing to draw or drawing fails."""
    d = alert.data
    if alert.kind == "drift":
        signal = d.get("drift")
        if not isinstance(signal, dict):
            return None
        head = signal.get("head")
        where = f"line {alert.line} · {alert.product}" + (f" · head {head}" if head else "")
        title = clean_header_text(f"{where} · {str(signal.get('method', '')).upper()}")
        try:
            return render_drift_chart(signal, title=title)
        except Exception:                  # a chart is a courtesy; the notice must go out without it
            log.exception("drift chart for %s could not be drawn", alert.dedup_key)
            return None
    values = d.get("values")
    if alert.kind not in CHART_KINDS or not isinstance(values, list) or not values:
        return None
    try:
        return render_chart(values, target=d.get("target"), mean=d.get("mean"), ci_low=d.get("ci_low"),
                            ci_high=d.get("ci_high"), unit=str(d.get("unit", "")),
                            title=clean_header_text(f"line {alert.line} · {alert.product} · lot {alert.lot}"))
    except Exception:                      # a chart is a courtesy; the notice must go out without it
        log.exception("chart for %s could not be drawn", alert.dedup_key)
        return None


def render_with_fallback(kind: str, context: dict[str, Any], templates: TemplateSet,
                         shipped: TemplateSet) -> RenderedMessage:
    """Render with the operator's set; on a render error use the shipped set; as a last resort plain text."""
    for tset in (templates, shipped):
        try:
            return tset.render(kind, context)
        except TemplateError as exc:
            log.error("alert template failed, falling back: %s", exc)
    items = context["alerts"]
    text = "\n".join(f"{it['kind']} line {it['line']} product {it['product']} lot {it['lot']}: {it['data']}"
                     for it in items) + "\n\n" + CAUTION + "\n"
    return RenderedMessage(subject=f"[lotwarden] {len(items)} alert{'' if len(items) == 1 else 's'}", text=text,
                           html="<pre>" + text.replace("&", "&amp;").replace("<", "&lt;") + "</pre>")


def build_message(alerts: list[Alert], *, sender: str, recipients: tuple[str, ...], now: float, folded: bool,
                  templates: TemplateSet, shipped: TemplateSet, mid: str | None = None) -> EmailMessage:
    """One message for ``alerts`` (its own kind's templates for one alert, the group templates for several).

    ``mid``: the Message-ID to use (a message repeated as recorded); by default the one of these alerts."""
    charts: list[tuple[str, bytes, str]] = []      # (cid, png, file name stem)
    items: list[dict[str, Any]] = []
    if mid is None:
        mid = message_id([a.dedup_key for a in alerts], sender.rpartition("@")[2])
    token = mid.strip("<>").split("@")[0]
    for i, a in enumerate(alerts):
        png = chart_for(a) if len(charts) < MAX_CHARTS else None
        cid = None
        if png is not None:
            cid = f"chart{i}.{token}@lotwarden"
            charts.append((cid, png, "drift-chart" if a.kind == "drift" else "lot-chart"))
        items.append({"kind": a.kind, "dedup_key": a.dedup_key, "created_at": a.created_at, "line": a.line,
                      "product": a.product, "lot": a.lot, "data": a.data, "chart_cid": cid})
    generated = datetime.fromtimestamp(now, UTC)
    ctx = message_context(items, folded=folded, generated_at=generated.isoformat(timespec="seconds"))
    kind = alerts[0].kind if len(alerts) == 1 and not folded else "group"
    rendered = render_with_fallback(kind, ctx, templates, shipped)

    msg = EmailMessage(policy=NOTICE_POLICY)
    msg["Subject"] = clean_header_text(rendered.subject) or "[lotwarden] alert"
    msg["From"] = clean_header_text(sender)
    msg["To"] = ", ".join(clean_header_text(r) for r in recipients)
    msg["Date"] = format_datetime(generated)
    msg["Message-ID"] = mid
    msg["Auto-Submitted"] = "auto-generated"
    msg.set_content(rendered.text)
    msg.add_alternative(rendered.html, subtype="html")
    if charts:
        html_part = msg.get_body(preferencelist=("html",))
        assert isinstance(html_part, EmailMessage)
        for n, (cid, png, stem) in enumerate(charts, start=1):
            html_part.add_related(png, "image", "png", cid=f"<{cid}>", filename=f"{stem}-{n}.png",
                                  disposition="inline")
    return msg
