"""The drift notice: a real DriftSignal (monitor.drift.advance) told through the e-mail channel to a real
aiosmtpd server on loopback; subject, text and HTML name what drifted, the chart's statistic against its limit
(checked against the e-Handbook recursions computed here) and the lots; the PNG chart is attached."""

from __future__ import annotations

import io
import math
import struct
from typing import Any

import pytest
from matplotlib import image as mpimg

from monitor.alerts import kinds
from monitor.alerts.alert import Alert
from monitor.alerts.compose import chart_for
from monitor.alerts.drift_chart import render_drift_chart
from monitor.alerts.templates import TemplateSet, message_context
from monitor.drift import DriftSignal, Track, advance
from monitor.errors import TemplateError
from monitor.rulebook import Rule

# Invented Brackenfield line L2, OAT-500 filled to a 502 g target; the z values are invented lot statistics.
AT = "2026-12-01T22:40:00+00:00"
NOW = 1_796_165_000.0                      # a little after AT
HOSTILE_LOT = "<script>alert(1)</script>"
CRLF_LOT = "B2110\r\nBcc: evil@example.invalid"
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"       # PNG spec (ISO/IEC 15948), section 5.2


def rule(drift: dict[str, Any]) -> Rule:
    table = {"name": "oat-500", "target": 502.0, "unit": "g", "drift": drift}
    return Rule.from_toml(table, source="rules/oat-500.toml", content_hash="7d1e0b9a4c2f" + "0" * 52)


def cusum_reference(z: list[float], k: float) -> list[tuple[float, float]]:
    """Tabular CUSUM, NIST/SEMATECH e-Handbook of Statistical Methods §6.3.2.3:
    S+_i = max(0, S+_{i-1} + z_i - k), S-_i = max(0, S-_{i-1} - z_i - k), S+_0 = S-_0 = 0."""
    hi = lo = 0.0
    out = []
    for x in z:
        hi = max(0.0, hi + x - k)
        lo = max(0.0, lo - x - k)
        out.append((hi, lo))
    return out


def ewma_reference(z: list[float], lam: float, L: float) -> list[tuple[float, float]]:
    """EWMA, NIST/SEMATECH e-Handbook §6.3.2.4: E_i = lam z_i + (1 - lam) E_{i-1}, E_0 = 0, limits
    ±L sqrt(lam / (2 - lam) (1 - (1 - lam)^(2 i))) (unit variance of the lot statistic)."""
    e = 0.0
    out = []
    for i, x in enumerate(z, start=1):
        e = lam * x + (1 - lam) * e
        out.append((e, L * math.sqrt(lam / (2 - lam) * (1 - (1 - lam) ** (2 * i)))))
    return out


def signal_of(r: Rule, lots: list[str], z: list[float], head: str = "") -> DriftSignal:
    """Feed the lots one by one as the daemon does; the chart must signal at the last lot and not before."""
    track: Track | None = None
    for i, (lot, x) in enumerate(zip(lots, z, strict=True)):
        track, sig = advance(track, line="L2", product="OAT-500", head=head, lot=lot, z=x, rule=r)
        if sig is not None:
            assert i == len(lots) - 1, f"signalled early at lot {i}"
            return sig
    raise AssertionError("no signal")


def drift_alert(sig: DriftSignal, signal_id: int = 1) -> Alert:
    return kinds.drift(line=sig.line, product=sig.product, lot=sig.lots[-1], signal_id=signal_id,
                       signal=sig.to_json(), at=AT)


def png_size(png: bytes) -> tuple[int, int]:
    """Width and height from the IHDR chunk, which follows the signature (PNG spec, section 11.2.2)."""
    assert png[:8] == PNG_SIGNATURE and png[12:16] == b"IHDR"
    return struct.unpack(">II", png[16:24])


def check_png(png: bytes) -> None:
    """A valid PNG that decodes, of the size its header says, with something drawn on it."""
    w, h = png_size(png)
    pixels = mpimg.imread(io.BytesIO(png), format="png")
    assert pixels.shape[:2] == (h, w) and w > 100 and h > 100
    assert float(pixels[..., :3].std()) > 0.01


# ------------------------------------------------------------------------------------------------- CUSUM up
CUSUM = {"method": "cusum", "k": 0.5, "h": 4.0}
UP_Z = [0.4, -0.3, 0.9, 1.2, 0.7, 1.5, 0.8, 1.3, 1.1, 1.0]
UP_LOTS = ["B2101", "B2102", "B2103", "B2104", HOSTILE_LOT, "B2106", "B2107", "B2108", "B2109", CRLF_LOT]


def test_cusum_up_notice_through_a_real_smtp_server(deliver_one) -> None:
    sig = signal_of(rule(CUSUM), UP_LOTS, UP_Z)
    ref = cusum_reference(UP_Z, k=0.5)
    s_plus = ref[-1][0]
    assert s_plus > 4.0 and all(hi <= 4.0 and lo <= 4.0 for hi, lo in ref[:-1])   # the recursion's own signal
    got = deliver_one(drift_alert(sig), now=NOW)
    m = got.message

    # subject: line, product, direction in words; the CR/LF lot never becomes a header
    subject = str(m["Subject"])
    for needle in ("DRIFT", "L2", "OAT-500", "creeping up", "giveaway rising", "CUSUM"):
        assert needle in subject, (needle, subject)
    assert "\r" not in subject and "\n" not in subject and "head" not in subject
    header_block = got.raw.split(b"\r\n\r\n", 1)[0]
    assert not any(line.lower().startswith(b"bcc:") for line in header_block.split(b"\r\n")), header_block
    assert m["Bcc"] is None and got.rcpt_tos == ["qa@brackenfield.example"]

    text = m.get_body(("plain",)).get_content().replace("\r\n", "\n")
    html = m.get_body(("html",)).get_content()
    for body in (text, html):
        assert "CUSUM" in body and "k = 0.5, h = 4" in body
        assert f"S+ = {s_plus:.3f}, above the decision limit h = 4.000" in body, body
        assert "creeping" in body and "giveaway is rising" in body
        assert "may have passed its own test" in body              # independent of the lots' own verdicts
        assert "10 lots since the chart's last restart" in body and "last 20 shown" not in body
        assert "check the filler" in body and "restarted from zero" in body
        # the caution: the tool screens, the competent authority decides (house rule)
        assert "weights-and-measures law by the competent authority" in body
        for lot in UP_LOTS[:4] + UP_LOTS[5:9]:
            assert lot in body, lot
    # every lot's S+ and S- as the e-Handbook recursion gives them
    for lot, x, (hi, lo) in zip(UP_LOTS, UP_Z, ref, strict=True):
        if lot not in (HOSTILE_LOT, CRLF_LOT):
            assert f"    {lot}: z {x:+.3f}, S+ {hi:.3f}, S- {lo:.3f}, h 4.000\n" in text, lot
            assert f"<tr><td>{lot}</td><td>{x:+.3f}</td><td>{hi:.3f}</td><td>{lo:.3f}</td>" in html, lot
    # hostile lot code: escaped in HTML, never markup
    assert "<script>" not in html and "&lt;script&gt;alert(1)&lt;/script&gt;" in html
    assert HOSTILE_LOT in text                                     # plain text shows it as written

    pngs = [p for p in m.walk() if p.get_content_type() == "image/png"]
    assert len(pngs) == 1 and pngs[0].get_filename() == "drift-chart-1.png"
    check_png(pngs[0].get_content())
    cid = str(pngs[0]["Content-ID"]).strip().strip("<>")
    assert f'src="cid:{cid}"' in html


# ------------------------------------------------------------------------------------ EWMA down, one head
EWMA = {"method": "ewma", "lambda": 0.2, "L": 3.0, "heads": True}
DOWN_Z = [-0.6, -1.1, -1.9, -1.4, -2.2, -1.7, -1.6]


def test_ewma_down_for_one_head(deliver_one) -> None:
    ref = ewma_reference(DOWN_Z, lam=0.2, L=3.0)
    first = next(i for i, (e, lim) in enumerate(ref) if abs(e) > lim)      # where the recursion signals
    z = DOWN_Z[: first + 1]
    lots = [f"J{4400 + i}" for i in range(len(z))]
    sig = signal_of(rule(EWMA), lots, z, head="H3")
    e, lim = ref[first]
    assert e < -lim
    got = deliver_one(drift_alert(sig), now=NOW)
    m = got.message
    subject = str(m["Subject"])
    for needle in ("L2", "OAT-500", "head H3", "creeping down", "short-fill risk", "EWMA"):
        assert needle in subject, (needle, subject)
    text = m.get_body(("plain",)).get_content().replace("\r\n", "\n")
    html = m.get_body(("html",)).get_content()
    for body in (text, html):
        assert "filler head H3" in body and "lambda = 0.2, L = 3" in body
        assert f"E = {e:.3f}, below the lower limit {-lim:.3f}" in body, body
        assert "risk of short fills is rising" in body and "adjusting the fill up" in body
        assert "competent authority" in body
        assert ", ".join(lots) in body
    for lot, x, (ei, li) in zip(lots, z, ref[: len(z)], strict=True):
        assert f"    {lot}: z {x:+.3f}, E {ei:+.3f}, limit ±{li:.3f}\n" in text, lot
    pngs = [p for p in m.walk() if p.get_content_type() == "image/png"]
    assert len(pngs) == 1
    check_png(pngs[0].get_content())


# ------------------------------------------------------------------------------ many lots, failures, checks
def render(alert: Alert) -> Any:
    items = [{"kind": alert.kind, "dedup_key": alert.dedup_key, "created_at": alert.created_at, "line": alert.line,
              "product": alert.product, "lot": alert.lot, "data": alert.data, "chart_cid": None}]
    return TemplateSet.load().render(alert.kind, message_context(items, folded=False, generated_at=AT))


def test_a_long_run_lists_the_last_20_lots_and_counts_all() -> None:
    """30 lots at z = ±0.5 keep both sums at 0 with k = 0.5 (§6.3.2.3 recursion), then three at 2.5 signal."""
    z = [0.5 if i % 2 else -0.5 for i in range(30)] + [2.5, 2.5, 2.5]
    assert cusum_reference(z, 0.5)[-1][0] == pytest.approx(6.0)
    lots = [f"C{3001 + i}" for i in range(len(z))]
    r = render(drift_alert(signal_of(rule(CUSUM), lots, z)))
    for body in (r.text, r.html):
        assert "33 lots since the chart's last restart; the last 20 shown" in body
        assert ", ".join(lots[-20:]) in body
        assert all(lot not in body for lot in lots[:13])
        assert "S+ = 6.000" in body


def test_a_chart_that_cannot_be_drawn_does_not_stop_the_notice(deliver_one) -> None:
    """Points without their chart values (a malformed payload): no PNG, the notice still goes out."""
    sig = signal_of(rule(CUSUM), [*UP_LOTS[:4], "B2105", *UP_LOTS[5:9], "B2110"], UP_Z).to_json()
    sig["points"] = [{"lot": p["lot"], "z": p["z"]} for p in sig["points"]]
    alert = kinds.drift(line="L2", product="OAT-500", lot="B2110", signal_id=9, signal=sig, at=AT)
    assert chart_for(alert) is None
    m = deliver_one(alert, now=NOW).message
    assert not [p for p in m.walk() if p.get_content_type() == "image/png"]
    text = m.get_body(("plain",)).get_content().replace("\r\n", "\n")
    assert "CUSUM" in text and "B2110" in text and "Chart:" not in text and "competent authority" in text


@pytest.mark.parametrize("method", ["cusum", "ewma"])
def test_chart_draws_lot_codes_as_written(method: str) -> None:
    """A lot code that is bad mathtext ($\\frac{$) is drawn as text, not parsed (it would raise if parsed)."""
    d = CUSUM if method == "cusum" else EWMA
    z = UP_Z if method == "cusum" else DOWN_Z
    ref = cusum_reference(z, 0.5) if method == "cusum" else ewma_reference(z, 0.2, 3.0)
    n = next(i for i, (a, b) in enumerate(ref) if (a > 4.0 or b > 4.0 if method == "cusum" else abs(a) > b)) + 1
    lots = ["$\\frac{$", *(f"D{i}" for i in range(1, n))]
    png = render_drift_chart(signal_of(rule(d), lots, z[:n]).to_json(), title="line $L2$ · $\\frac{")
    check_png(png)


def test_operator_drift_template_is_checked_against_a_drift_sample(tmp_path) -> None:
    """validate / load test-renders operator templates: the drift fields exist; a wrong one is an error."""
    (tmp_path / "drift.subject.txt").write_text(
        "Drift {{ alert.line }} {{ data.drift.direction }} {{ data.drift.statistic | num }} "
        "> {{ data.drift.limit | num }} ({{ data.drift.settings.k }}, {{ data.drift.lots | length }} lots)")
    TemplateSet.check(tmp_path)
    (tmp_path / "drift.body.txt").write_text("{{ data.drift.no_such_key }}")
    with pytest.raises(TemplateError) as err:
        TemplateSet.check(tmp_path)
    assert err.value.path == str(tmp_path / "drift.body.txt")


def test_a_drift_alert_in_a_grouped_message_is_told_in_words_with_its_chart() -> None:
    """Two drift signals arriving together go in one group message: each is told by its own lines (not the
    raw data table) and the HTML shows each one's chart by its cid."""
    from monitor.alerts.compose import build_message

    z = [1.5, 1.6, 1.7, 1.8]                      # S+ = 1.0, 2.1, 3.3, 4.6 > 4 (§6.3.2.3 recursion)
    assert cusum_reference(z, 0.5)[-1][0] == pytest.approx(4.6)
    r = rule(CUSUM)                                # k = 0.5, h = 4
    a = drift_alert(signal_of(r, ["G1", "G2", "G3", "G4"], z), 1)
    b = drift_alert(signal_of(r, ["G1", "G2", "G3", "G4"], z, head="H2"), 2)
    ts = TemplateSet.load()
    msg = build_message([a, b], sender="lotwarden@brackenfield.example", recipients=("qa@brackenfield.example",),
                        now=1_800_000_000.0, folded=False, templates=ts, shipped=ts)
    text = msg.get_body(("plain",)).get_content()
    html = msg.get_body(("html",)).get_content()
    assert text.count("mean creeping up (giveaway rising) across lots") == 2 and "head H2 of line L2" in text
    assert "statistic 4.600 against limit 4.000 at lot G4" in text
    assert html.count('src="cid:') == 2 and "settings" not in html        # no raw data table
