"""The record commands' way into the state: the config's database opened beside a running daemon."""

from __future__ import annotations

import argparse
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

from monitor.daemon.config import Config, load_config
from monitor.errors import ConfigError, LotwardenError
from monitor.state.database import DB_NAME, Database, DatabaseError

DEFAULT_CONFIG = "config/lotwarden.toml"


class StateMissing(LotwardenError):
    """The config's state folder has no database yet (the daemon never ran with this config)."""


def add_config_flag(p: argparse.ArgumentParser) -> None:
    """``--config PATH`` as every command has it."""
    p.add_argument("--config", default=DEFAULT_CONFIG, metavar="CONFIG",
                   help=f"daemon config file (default: {DEFAULT_CONFIG}); its [state] folder holds the record")


def db_path(config: Config) -> Path:
    return Path(config.state.folder) / DB_NAME


def existing_db(config: Config, config_path: str | Path) -> Path:
    """The config's state database file; StateMissing naming ``state.folder`` when there is none yet."""
    path = db_path(config)
    if not path.is_file():
        raise StateMissing(f"no state database at {path}", path=config_path, key="state.folder",
                           hint="`lotwarden run` with this config creates it when it starts")
    return path


@contextmanager
def open_state(config_path: str | Path) -> Iterator[tuple[Config, Database]]:
    """The config and its state database, upgraded to this code's schema if older (a newer one is refused:
    SchemaVersionError). Safe while the daemon runs: transactions wait on its lock (busy timeout), and the
    WAL checkpoint is left to the daemon. Raises StateMissing when there is no database."""
    config = load_config(config_path)
    path = existing_db(config, config_path)
    try:
        db = Database.open(config.state.folder)
    except DatabaseError as exc:
        raise ConfigError(f"the state database {path} cannot be opened: {exc}", path=config_path,
                          key="state.folder") from None
    try:
        yield config, db
    finally:
        db.close(checkpoint=False)
