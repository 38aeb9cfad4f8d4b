"""The daemon config file: defaults, relative paths, rejected keys and values, and the key table."""

from __future__ import annotations

from pathlib import Path

import pytest

from monitor.daemon.config import CONFIG_KEYS, Config, load_config, load_rule_set
from monitor.errors import ConfigError, RuleError


def test_defaults_and_relative_paths(tmp_path: Path, make_setup) -> None:
    """Paths resolve relative to the config file; unset keys take the documented defaults."""
    cfg = load_config(make_setup(tmp_path))
    assert isinstance(cfg, Config)
    base = (tmp_path / "config").resolve()
    assert cfg.rules_dir.resolve() == (tmp_path / "rules").resolve()
    assert cfg.watch.folder.resolve() == (tmp_path / "drop").resolve()
    assert cfg.state.folder.resolve() == (base / "../state").resolve()
    assert cfg.state.archive == cfg.state.folder / "archive"
    assert cfg.state.quarantine == cfg.state.folder / "quarantine"
    assert cfg.watch.settle_seconds == 0.0
    assert cfg.watch.polling is False
    assert cfg.watch.poll_interval == CONFIG_KEYS["watch.poll_interval"][0]
    assert cfg.watch.rescan_seconds == CONFIG_KEYS["watch.rescan_seconds"][0]
    assert cfg.alerts.channels == ("log",)
    assert len(cfg.content_hash) == 64


def test_content_hash_changes_with_the_bytes(tmp_path: Path, make_setup) -> None:
    """An edit of the file changes the content hash (it names the config version in the audit trail)."""
    p = make_setup(tmp_path)
    h1 = load_config(p).content_hash
    p.write_text(p.read_text() + "\n# edited\n")
    assert load_config(p).content_hash != h1


def test_full_config_with_every_documented_key(tmp_path: Path, make_setup) -> None:
    """Every key in CONFIG_KEYS is accepted by the loader (the table documents what the file may hold)."""
    p = make_setup(tmp_path, extra="""
        [alerts.email]
        host = "127.0.0.1"
        port = 2525
        security = "none"
        sender = "lotwarden@brackenfield.example"
        recipients = ["qa@brackenfield.example"]
        """)
    text = p.read_text().replace("settle_seconds = 0", "settle_seconds = 2.5\npolling = true\npoll_interval = 1\n"
                                 "rescan_seconds = 30\ninclude = [\"*.csv\"]\nignore = [\".*\", \"*.tmp\"]")
    text = text.replace('folder = "../state"', 'folder = "../state"\narchive = "../arch"\nquarantine = "../q"')
    p.write_text(text)
    cfg = load_config(p)
    seen = {"rules_dir", "watch.folder", "watch.settle_seconds", "watch.polling", "watch.poll_interval",
            "watch.rescan_seconds", "watch.include", "watch.ignore", "state.folder", "state.archive",
            "state.quarantine", "alerts.log.path", "alerts.email.host", "alerts.email.port",
            "alerts.email.security", "alerts.email.sender", "alerts.email.recipients"}
    assert seen <= set(CONFIG_KEYS)
    assert cfg.watch.polling is True and cfg.watch.settle_seconds == 2.5
    assert cfg.watch.include == ("*.csv",)
    assert cfg.state.archive.resolve() == (tmp_path / "arch").resolve()
    assert cfg.alerts.channels == ("log", "email")


def test_every_key_has_a_doc_line() -> None:
    """Each documented key carries a non-empty one-line description."""
    for key, (_default, doc) in CONFIG_KEYS.items():
        assert doc.strip() and "\n" not in doc, key


@pytest.mark.parametrize(("edit", "key", "allowed"), [
    (("[watch]", "[watch]\nsettle_secs = 3"), "watch.settle_secs", "allowed keys"),
    (("rules_dir", "rule_dir = 'x'\nrules_dir"), "rule_dir", "allowed keys"),
    (("settle_seconds = 0", "settle_seconds = -1"), "watch.settle_seconds", ">= 0"),
    (("settle_seconds = 0", "settle_seconds = \"5\""), "watch.settle_seconds", "finite number"),
    (("settle_seconds = 0", "settle_seconds = 0\npolling = \"yes\""), "watch.polling", "true or false"),
    (("settle_seconds = 0", "settle_seconds = 0\npoll_interval = 0"), "watch.poll_interval", "> 0"),
    (("settle_seconds = 0", "settle_seconds = 0\ninclude = [\"a/*.csv\"]"), "watch.include", "file-name"),
    (("[state]", "[state]\narchive = \"../drop\""), "state.archive", "drop folder"),
    (("folder = \"../drop\"\n", ""), "watch.folder", "required"),
])
def test_bad_values_name_file_key_and_allowed(tmp_path: Path, make_setup, edit: tuple[str, str], key: str,
                                              allowed: str) -> None:
    """A wrong key, type or range raises ConfigError naming the file, the key path and what is allowed."""
    p = make_setup(tmp_path)
    p.write_text(p.read_text().replace(edit[0], edit[1], 1))
    with pytest.raises(ConfigError) as info:
        load_config(p)
    err = info.value
    assert err.path == str(p)
    assert err.key == key
    assert allowed in str(err)


def test_toml_syntax_error_names_the_file(tmp_path: Path, make_setup) -> None:
    """A TOML syntax error is a ConfigError naming the file and tomllib's line/column."""
    p = make_setup(tmp_path)
    p.write_text(p.read_text() + "\n[watch\n")
    with pytest.raises(ConfigError) as info:
        load_config(p)
    assert info.value.path == str(p) and "line" in str(info.value)


def test_missing_file_is_a_config_error(tmp_path: Path, make_setup) -> None:
    """A config path that does not exist is a ConfigError, not an OSError."""
    with pytest.raises(ConfigError):
        load_config(tmp_path / "nope.toml")


def test_load_rule_set_reads_the_rules_folder(tmp_path: Path, make_setup) -> None:
    """load_rule_set returns the rules of rules_dir; a bad rule is a RuleError naming the rule file."""
    cfg = load_config(make_setup(tmp_path))
    assert sorted(r.name for r in load_rule_set(cfg)) == ["juice-1l", "oat-500"]
    bad = tmp_path / "rules" / "jam-340.toml"
    bad.write_text('name = "jam"\ntarget = 340\nunit = "g"\nalpha = 1.5\n')
    with pytest.raises(RuleError) as info:
        load_rule_set(cfg)
    assert info.value.path == str(bad) and info.value.key == "alpha"


def test_accepts_filters_bare_names(tmp_path: Path, make_setup) -> None:
    """include/ignore match the bare file name: hidden, temporary, marker and reason files are never taken."""
    w = load_config(make_setup(tmp_path)).watch
    assert w.accepts("L1_OAT-500_20261201.csv")
    assert w.accepts("export.TXT") is False  # fnmatchcase: patterns are case-sensitive
    for name in (".L1.csv", "L1.csv.tmp", "L1.csv.part", "~L1.csv", "L1.csv.swp", "L1.csv.reason.txt", "L1.xlsx",
                 "L1.csv.done"):
        assert not w.accepts(name), name


def test_profiles_become_feed_profiles_in_file_order(tmp_path: Path, make_setup) -> None:
    """[profiles.<name>] tables are validated by the reader's FeedProfile; a bad key names its path."""
    p = make_setup(tmp_path, extra="""
        [profiles.hall2]
        match = ["L2-*.txt"]
        delimiter = ";"
        decimal = ","

        [profiles.hall3]
        match = ["L3-*.csv"]
        density = 1.045
        """)
    cfg = load_config(p)
    assert [pr.name for pr in cfg.profiles] == ["hall2", "hall3"]
    assert cfg.profiles[1].density == 1.045
    assert "profiles.<name>.density" in CONFIG_KEYS
    p.write_text(p.read_text().replace("density = 1.045", "densty = 1.045"))
    with pytest.raises(ConfigError) as info:
        load_config(p)
    assert info.value.key == "profiles.hall3.densty" and info.value.path == str(p)


def test_the_shipped_config_loads(repo_root: Path) -> None:
    """config/lotwarden.toml of the repository is valid."""
    cfg = load_config(repo_root / "config" / "lotwarden.toml")
    assert cfg.profiles and cfg.alerts.channels
