"""The one key schema: every section's keys declared once feed validation, defaults, `~` and the reference."""

from __future__ import annotations

import dataclasses
from pathlib import Path

import pytest

from monitor import keys as K
from monitor.alerts import settings as S
from monitor.daemon.config import Config, StateSettings, WatchSettings, load_config
from monitor.errors import ConfigError
from monitor.ingest.profile import FeedProfile
from monitor.keysdoc import render
from monitor.rulebook import DriftRule, NormalityRule, Rule

# settings class -> (its section, fields that are no key of the file)
CLASSES: dict[type, tuple[K.Section, set[str]]] = {
    Config: (K.CONFIG, {"source", "content_hash"}), WatchSettings: (K.WATCH, set()), StateSettings: (K.STATE, set()),
    FeedProfile: (K.PROFILE, {"name", "source"}), S.AlertSettings: (K.ALERTS, set()),
    S.LogSettings: (K.ALERTS_LOG, set()), S.EmailSettings: (K.ALERTS_EMAIL, {"routes"}),
    S.Route: (K.ALERTS_EMAIL_ROUTE, set()), S.CommandSettings: (K.ALERTS_COMMAND, set()),
    S.DigestSettings: (K.ALERTS_DIGEST, set()), Rule: (K.RULE, {"source", "content_hash", "text"}),
    NormalityRule: (K.NORMALITY, {"enabled"}), DriftRule: (K.DRIFT, set()),
}
ALIASES = {"lam": "lambda"}   # a field named apart from its key ("lambda" is a Python keyword)


def test_every_setting_is_a_declared_key_and_back() -> None:
    """Each field of a settings value has a declared key (so it is documented), and each key a field."""
    assert sorted(id(s) for s, _ in CLASSES.values()) == sorted(id(s) for s in K.SECTIONS)
    for cls, (section, extra) in CLASSES.items():
        fields = {ALIASES.get(f.name, f.name) for f in dataclasses.fields(cls)} - extra
        names = set(section.names) - ({"route"} if section is K.ALERTS_EMAIL else set())
        assert fields == names, cls.__name__


def test_dataclass_defaults_are_the_declared_defaults() -> None:
    """A settings value built without a key holds the same default the reader gives (one default per key)."""
    for cls, (section, _extra) in CLASSES.items():
        for f in dataclasses.fields(cls):
            name = ALIASES.get(f.name, f.name)
            if name not in section.names or f.default is dataclasses.MISSING or section[name].type == "table":
                continue   # a sub-table's field holds what its own section's values build
            declared = section[name].default
            if isinstance(declared, (K.Required, K.Derived)):
                continue
            assert f.default == declared, (cls.__name__, f.name)


def test_a_key_without_doc_cannot_be_declared() -> None:
    """An undocumented key is refused when it is declared, so it never reaches the reference without a line."""
    with pytest.raises(ValueError, match="doc"):
        K.Key("colour", "string", None, None, "")
    with pytest.raises(ValueError, match="doc"):
        K.Key("colour", "string", None, None, "two\nlines")


def test_the_reference_has_a_row_for_every_declared_key() -> None:
    """README's generated reference names every key of every section with its doc."""
    text = render()
    for section in K.SECTIONS:
        for key in section.keys:
            row = f"| `{section.prefix}{key.name}` |"
            assert row in text, row
            assert key.doc.replace("|", "\\|") in text


def test_an_added_key_changes_the_reference() -> None:
    """A key added to a section shows up in the rendering (README's test then fails until it is regenerated)."""
    more = dataclasses.replace(K.WATCH, keys=(*K.WATCH.keys, K.Key("depth", "integer", 1, None, "how deep")))
    assert "`watch.depth`" in render((more,)) and "`watch.depth`" not in render()


@pytest.mark.parametrize("section", K.SECTIONS, ids=lambda s: s.where)
def test_unknown_keys_are_errors_in_every_section(section: K.Section) -> None:
    """An unknown key in any section names the file, the key path and the allowed keys."""
    with pytest.raises(ConfigError) as info:
        K.read(section, {"no_such_key": 1}, source="plant.toml")
    err = info.value
    assert err.path == "plant.toml" and err.key == f"{section.prefix}no_such_key"
    assert "allowed keys: " + ", ".join(section.names) in str(err)


def test_messages_name_the_value_and_what_is_allowed() -> None:
    """A wrong value's message shows the value as written and the allowed range or form."""
    with pytest.raises(ConfigError) as info:
        K.read(K.WATCH, {"folder": "drop", "poll_interval": -0.25}, source="plant.toml")
    assert str(info.value) == "plant.toml: watch.poll_interval: poll_interval = -0.25 — must be > 0"
    with pytest.raises(ConfigError) as info:
        K.read(K.RULE, {"name": "x", "target": 1.0, "unit": "g", "min_n": 1.5}, source="r.toml")
    assert "min_n = 1.5 — must be a whole number >= 2" in str(info.value)


def _write_every_path_key_as_home(tmp_path: Path) -> Path:
    cfg = tmp_path / "cfg" / "lotwarden.toml"
    cfg.parent.mkdir()
    cfg.write_text("""
rules_dir = "~/rules"
[watch]
folder = "~/drop"
[state]
folder = "~/state"
archive = "~/arch"
quarantine = "~/quar"
[alerts]
templates = "~/tpl"
[alerts.log]
path = "~/log/alerts.jsonl"
[alerts.email]
host = "127.0.0.1"
sender = "lotwarden@brackenfield.example"
recipients = ["qa@brackenfield.example"]
username = "lw"
password_file = "~/secret/pw"
ca_file = "~/ca.pem"
""", encoding="utf-8")
    return cfg


def test_every_path_key_gets_tilde_expanded(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """`~` in every path-typed key of every section becomes the home folder, [alerts.log] included."""
    home = tmp_path / "home"
    monkeypatch.setenv("HOME", str(home))
    expected = Path("~").expanduser()             # the standard library's expansion (os.path.expanduser)
    assert expected == home
    cfg = load_config(_write_every_path_key_as_home(tmp_path))
    got = {
        "rules_dir": cfg.rules_dir, "watch.folder": cfg.watch.folder, "state.folder": cfg.state.folder,
        "state.archive": cfg.state.archive, "state.quarantine": cfg.state.quarantine,
        "alerts.templates": cfg.alerts.templates, "alerts.log.path": cfg.alerts.log.path if cfg.alerts.log else None,
        "alerts.email.password_file": cfg.alerts.email.password_file if cfg.alerts.email else None,
        "alerts.email.ca_file": cfg.alerts.email.ca_file if cfg.alerts.email else None,
    }
    # the test covers exactly the keys declared as paths: a new path key makes it fail until it is added
    assert set(got) == {f"{s.prefix}{k.name}" for s, k in K.path_keys()}
    want = {"rules_dir": "rules", "watch.folder": "drop", "state.folder": "state", "state.archive": "arch",
            "state.quarantine": "quar", "alerts.templates": "tpl", "alerts.log.path": "log/alerts.jsonl",
            "alerts.email.password_file": "secret/pw", "alerts.email.ca_file": "ca.pem"}
    for key, rel in want.items():
        assert got[key] == expected / rel, key


def test_relative_paths_stay_relative_to_the_config_folder(tmp_path: Path) -> None:
    """A path key without `~` is taken from the config file's folder (also in [alerts.log])."""
    cfg = tmp_path / "lotwarden.toml"
    cfg.write_text('rules_dir = "rules"\n[watch]\nfolder = "drop"\n[state]\nfolder = "state"\n'
                   '[alerts.log]\npath = "../log/a.jsonl"\n', encoding="utf-8")
    loaded = load_config(cfg)
    assert loaded.alerts.log is not None
    assert loaded.alerts.log.path == tmp_path.resolve().parent / "log" / "a.jsonl"
    assert loaded.watch.folder == tmp_path.resolve() / "drop"
