"""Templates: operator files override shipped ones; sandboxed, autoescaped, strict; a bad edit keeps the old set."""

from __future__ import annotations

import pytest

from monitor.alerts.dispatch import Dispatcher
from monitor.alerts.settings import AlertSettings, EmailSettings
from monitor.alerts.templates import SHIPPED_DIR, TemplateSet, required_names, sample_context
from monitor.errors import TemplateError


def test_shipped_set_is_complete_and_carries_the_caution():
    """Every kind has subject, text and HTML; hold, review, group and digest bodies carry the legal caution."""
    names = {p.name for p in SHIPPED_DIR.iterdir()}
    assert set(required_names()) <= names
    ts = TemplateSet.load()
    for kind in ("hold", "review", "group", "digest"):
        m = ts.render(kind, sample_context(kind))
        assert "competent authority" in m.text and "competent authority" in m.html


def test_operator_file_wins_and_html_is_escaped(tmp_path):
    """A same-named operator file replaces the shipped one; data in HTML bodies is escaped."""
    (tmp_path / "hold.body.html").write_text("<p>{{ alert.lot }}</p>")
    (tmp_path / "hold.subject.txt").write_text("Brackenfield hold {{ alert.lot }}")
    ts = TemplateSet.load(tmp_path)
    ctx = sample_context()
    ctx["alert"] = dict(ctx["alert"], lot="<script>x</script>")
    m = ts.render("hold", ctx)
    assert m.subject == "Brackenfield hold <script>x</script>"       # plain text: not escaped (header cleaned later)
    assert m.html == "<p>&lt;script&gt;x&lt;/script&gt;</p>"


@pytest.mark.parametrize("body, expect", [
    ("{% if alert.lot %}unclosed", "syntax"),
    ("{{ alert.no_such_field }}", "render"),
    ("{{ alert.__class__.__mro__ }}", "render"),                     # sandbox: no access to internals
    ("{{ ''.__class__.__subclasses__() }}", "render"),
])
def test_bad_operator_template_is_a_template_error_naming_the_file(tmp_path, body, expect):
    """Syntax errors, undefined names and unsafe attribute access fail at load with file (and line)."""
    f = tmp_path / "hold.body.txt"
    f.write_text("first line\n" + body)
    with pytest.raises(TemplateError) as err:
        TemplateSet.load(tmp_path)
    assert err.value.path == str(f)
    if expect == "syntax":
        assert err.value.line == 2


def test_unknown_operator_template_name_is_refused(tmp_path):
    """A misspelt file name is an error listing what is allowed, not silently ignored."""
    (tmp_path / "hlod.subject.txt").write_text("x")
    with pytest.raises(TemplateError, match="unknown template name"):
        TemplateSet.load(tmp_path)


def test_reload_with_broken_template_keeps_the_last_good_set(db_path, tmp_path, put, alert_factory, smtp_factory):
    """After a failed reload the dispatcher still sends with the operator's previous good templates."""
    tdir = tmp_path / "tpl"
    tdir.mkdir()
    (tdir / "hold.subject.txt").write_text("GOOD {{ alert.lot }}")
    srv = smtp_factory()
    em = EmailSettings(host="127.0.0.1", port=srv.port, security="none", sender="lotwarden@brackenfield.example",
                       recipients=("qa@brackenfield.example",), timeout=10)
    s = AlertSettings(email=em, templates=tdir, group_window_seconds=0)
    d = Dispatcher(db_path, s)
    try:
        (tdir / "hold.subject.txt").write_text("BROKEN {{ alert.lot ")
        with pytest.raises(TemplateError):
            d.reload_templates(tdir)
        put(alert_factory(lot="K1"), ["email"])
        assert d.drain(now=1_796_162_500.0) == 1
    finally:
        d.close()
    assert srv.received[0].message["Subject"] == "GOOD K1"


def test_render_failure_at_send_falls_back_to_shipped_templates(db_path, tmp_path, put, alert_factory,
                                                                smtp_factory):
    """An operator template that fails on real data (a field the sample had) does not lose the alert."""
    tdir = tmp_path / "tpl"
    tdir.mkdir()
    (tdir / "file-rejected.subject.txt").write_text("rejected {{ data.path }}")
    srv = smtp_factory()
    em = EmailSettings(host="127.0.0.1", port=srv.port, security="none", sender="lotwarden@brackenfield.example",
                       recipients=("qa@brackenfield.example",), timeout=10)
    d = Dispatcher(db_path, AlertSettings(email=em, templates=tdir, group_window_seconds=0))
    try:
        put(alert_factory("file-rejected", lot="", data={"reason": "no lot column"}, key="fr|1"), ["email"])
        assert d.drain(now=1_796_162_500.0) == 1
    finally:
        d.close()
    assert srv.received[0].message["Subject"].startswith("[lotwarden] export rejected")


def test_broken_templates_at_start_use_shipped_set_and_raise_config_rejected(db_path, tmp_path, put,
                                                                             alert_factory, smtp_factory):
    """A dispatcher started with a broken operator set still delivers (shipped set) and says why."""
    import json

    from monitor.alerts.settings import LogSettings

    tdir = tmp_path / "tpl"
    tdir.mkdir()
    (tdir / "hold.subject.txt").write_text("{% for %}")
    srv = smtp_factory()
    em = EmailSettings(host="127.0.0.1", port=srv.port, security="none", sender="lotwarden@brackenfield.example",
                       recipients=("qa@brackenfield.example",), timeout=10)
    log_path = tmp_path / "alerts.jsonl"
    d = Dispatcher(db_path, AlertSettings(log=LogSettings(path=log_path), email=em, templates=tdir,
                                          group_window_seconds=0))
    try:
        assert d.template_error is not None and d.template_error.path == str(tdir / "hold.subject.txt")
        put(alert_factory(lot="S1", created_at="2020-01-01T00:00:00+00:00"), ["log", "email"])
        d.drain()
    finally:
        d.close()
    kinds = [json.loads(x)["kind"] for x in log_path.read_text().splitlines()]
    assert kinds == ["config-rejected", "hold"]
    assert any("lot S1: HOLD" in r.message.get_body(("plain",)).get_content() for r in srv.received)


def test_verdict_lists_filler_heads_when_the_export_names_them() -> None:
    """The notice shows each filler head's n, mean, offset and p, so the drifting head can be found."""
    from monitor.alerts.templates import TemplateSet, message_context

    data = {"n": 20, "mean": 502.0, "target": 503.0, "unit": "g", "alpha": 0.01, "verdict": "review",
            "heads": [{"head": "H1", "n": 10, "mean": 502.6, "sd": 1.1, "offset": -0.4, "p_value": 0.3},
                      {"head": "H4", "n": 10, "mean": 496.7, "sd": 4.0, "offset": -6.3, "p_value": 0.0004}]}
    ctx = message_context([{"kind": "review", "dedup_key": "k", "created_at": "2026-11-30T06:00:00+00:00",
                            "line": "L1", "product": "OAT-500", "lot": "A3", "data": data, "chart_cid": None}],
                          folded=False, generated_at="2026-11-30T06:00:00+00:00")
    r = TemplateSet.load().render("review", ctx)
    assert "H4: n = 10, mean 496.70, offset -6.30 g" in r.text
    assert "<td>H4</td>" in r.html
