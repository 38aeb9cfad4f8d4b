"""The [alerts.*] config sections: validation, documented keys, password never in the config."""

from __future__ import annotations

import tomllib
from pathlib import Path

import pytest

from monitor.alerts import settings as S
from monitor.errors import ConfigError

BASE = """
[alerts.log]
path = "log/alerts.jsonl"
[alerts.email]
host = "127.0.0.1"
port = 2525
sender = "lotwarden@brackenfield.example"
recipients = ["qa@brackenfield.example"]
"""


def parse(text: str, base: Path = Path("/srv/lw")) -> S.AlertSettings:
    return S.parse_alerts(tomllib.loads(text)["alerts"], source="lotwarden.toml", base_dir=base)


def test_minimal_config_parses_with_defaults():
    """Log and e-mail sections parse; relative paths are taken from the config folder; defaults fill in."""
    s = parse(BASE)
    assert s.channels == ("log", "email")
    assert s.log.path == Path("/srv/lw/log/alerts.jsonl")
    # documented defaults (ALERTS_KEYS / EMAIL_KEYS): 60 s
    assert s.email.retry_max_seconds == 60.0 and s.group_window_seconds == 60.0


def test_password_in_config_is_refused_with_reason():
    """A `password` key is an error that says to use password_env or password_file, and does not echo it."""
    with pytest.raises(ConfigError) as err:
        parse(BASE + 'username = "lw"\npassword = "hunter2-secret"\n')
    text = str(err.value)
    assert "alerts.email.password" in text and "password_env" in text and "hunter2-secret" not in text


def test_password_read_from_env_or_file_and_not_in_repr(tmp_path, monkeypatch):
    """The secret is read when asked for, and never appears in the settings' repr."""
    monkeypatch.setenv("LW_SMTP_PW", "s3cr3t-value")
    s = parse(BASE + 'username = "lw"\npassword_env = "LW_SMTP_PW"\n')
    assert s.email.read_password() == "s3cr3t-value"
    assert "s3cr3t-value" not in repr(s)
    pw = tmp_path / "pw"
    pw.write_text("file-secret\n")
    s2 = parse(BASE + f'username = "lw"\npassword_file = "{pw}"\n')
    assert s2.email.read_password() == "file-secret" and "file-secret" not in repr(s2)


@pytest.mark.parametrize("extra, key", [
    ('colour = "red"\n', "alerts.email.colour"),
    ('security = "ssl"\n', "alerts.email.security"),
    ('security = "tls"\nhelo = 1\n', "alerts.email.helo"),
    ('timeout = -1\n', "alerts.email.timeout"),
    ('password_env = "X"\n', "alerts.email.username"),
])
def test_bad_email_keys_name_the_key(extra, key):
    """Each bad value is a ConfigError naming the file and the key path."""
    with pytest.raises(ConfigError) as err:
        parse(BASE + extra)
    assert err.value.key == key and err.value.path == "lotwarden.toml"


def test_header_breaking_recipient_is_refused():
    """A recipient with a line break or display name is refused at load time."""
    with pytest.raises(ConfigError):
        parse(BASE.replace('["qa@brackenfield.example"]', '["qa@brackenfield.example\\nBcc: x@evil.example"]'))


def test_routes_select_by_line_product_kind():
    """Routes add recipients to the defaults by line / product / kind; replace_default makes a route replace
    them; an alert no route selects goes to the defaults."""
    s = parse(BASE + """
[[alerts.email.route]]
lines = ["L1"]
recipients = ["l1-qa@brackenfield.example"]
[[alerts.email.route]]
products = ["JAM-*"]
kinds = ["hold"]
recipients = ["jam@brackenfield.example"]
[[alerts.email.route]]
lines = ["L3"]
kinds = ["review"]
recipients = ["l3-lead@brackenfield.example"]
replace_default = true
""")
    assert s.email.recipients_for("hold", "L1", "OAT-500") == ("l1-qa@brackenfield.example",
                                                               "qa@brackenfield.example")
    assert s.email.recipients_for("hold", "L1", "JAM-340") == ("jam@brackenfield.example",
                                                               "l1-qa@brackenfield.example",
                                                               "qa@brackenfield.example")
    assert s.email.recipients_for("review", "L2", "JAM-340") == ("qa@brackenfield.example",)
    assert s.email.recipients_for("review", "L3", "JAM-340") == ("l3-lead@brackenfield.example",)
    assert s.email.recipients_for("hold", "L3", "JAM-340") == ("jam@brackenfield.example",
                                                               "qa@brackenfield.example")
    # a verdict-changed alert is selected by the kind of the verdict it replaces
    assert s.email.recipients_for("verdict-changed", "L3", "OAT-500", "review") == ("l3-lead@brackenfield.example",)
    assert s.email.recipients_for("verdict-changed", "L3", "OAT-500", "hold") == ("qa@brackenfield.example",)
    assert s.email.routes[2].replace_default is True and s.email.routes[0].replace_default is False


@pytest.mark.parametrize("extra, key, needle", [
    ('replace_default = "yes"\n', "alerts.email.route[0].replace_default", "true or false"),
    ('replace_default = 1\n', "alerts.email.route[0].replace_default", "true or false"),
    ('replace = true\n', "alerts.email.route[0].replace", "replace_default"),
    ('kinds = ["verdict-chagned"]\n', "alerts.email.route[0].kinds", "verdict-changed"),
])
def test_bad_route_keys_name_file_and_key(extra, key, needle):
    """A wrong route key or value is a ConfigError naming the file, the route's key and what is allowed."""
    with pytest.raises(ConfigError) as err:
        parse(BASE + '[[alerts.email.route]]\nrecipients = ["lead@brackenfield.example"]\n' + extra)
    assert err.value.key == key and err.value.path == "lotwarden.toml"
    assert needle in str(err.value)


def test_verdict_changed_is_a_known_route_kind():
    """A route may select the verdict-changed kind by name."""
    s = parse(BASE + '[[alerts.email.route]]\nkinds = ["verdict-changed"]\nreplace_default = true\n'
                     'recipients = ["lead@brackenfield.example"]\n')
    assert s.email.recipients_for("verdict-changed", "L1", "X", "hold") == ("lead@brackenfield.example",)
    assert s.email.recipients_for("hold", "L1", "X") == ("qa@brackenfield.example",)


def test_command_and_digest_sections():
    """argv must be a list (no shell string); digest cron and time zone are checked."""
    s = parse('[alerts.command]\nargv = ["/usr/bin/true"]\n[alerts.digest]\ncron = "0 6 * * *"\n'
              'timezone = "Europe/Berlin"\n')
    assert s.channels == ("command",) and s.digest.timezone == "Europe/Berlin"
    for bad, key in [('[alerts.command]\nargv = "notify --all"\n', "alerts.command.argv"),
                     ('[alerts.digest]\ntimezone = "Mars/Olympus"\n', "alerts.digest.timezone"),
                     ('[alerts.digest]\ncron = "61 6 * * *"\n', "alerts.digest.cron"),
                     ('[alerts.pager]\nx = 1\n', "alerts.pager")]:
        with pytest.raises(ConfigError) as err:
            parse(bad)
        assert err.value.key == key


def test_every_settings_field_is_documented():
    """Each settings field has a row in its section's keys table (routes under `route`)."""
    tables = {S.LogSettings: S.LOG_KEYS, S.CommandSettings: S.COMMAND_KEYS, S.DigestSettings: S.DIGEST_KEYS,
              S.Route: S.ROUTE_KEYS, S.AlertSettings: S.ALERTS_KEYS}
    for cls, keys in tables.items():
        for f in cls.__dataclass_fields__:
            assert f in keys or f in S.SECTION_KEYS, (cls.__name__, f)
    for f in S.EmailSettings.__dataclass_fields__:
        assert f in S.EMAIL_KEYS or f == "routes", f
    for keys in (S.ALERTS_KEYS, S.LOG_KEYS, S.EMAIL_KEYS, S.COMMAND_KEYS, S.DIGEST_KEYS, S.ROUTE_KEYS):
        assert all(isinstance(doc, str) and doc for _, doc in keys.values())
