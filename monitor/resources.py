"""Locates the files lotwarden ships (alert templates, demo feeds and rules, sample config), installed or not.

A wheel carries the checkout's top-level ``config/``, ``sample_feeds/`` and ``rules/`` folders inside the
package as ``monitor/_shipped/`` (same layout, so the sample config's relative paths keep their meaning);
an editable install or a plain checkout has no ``_shipped/`` and uses the folders beside ``monitor/``.
This module is the one place that knows either layout.
"""

from __future__ import annotations

from functools import cache
from importlib.resources import files
from pathlib import Path

from monitor.errors import ConfigError

SHIPPED_PACKAGE_DIR = "_shipped"
_MARKER = Path("config") / "templates"


@cache
def shipped_root() -> Path:
    """The folder holding ``config/``, ``sample_feeds/`` and ``rules/``: the package's ``_shipped/`` in an
    installed wheel, else the checkout root (the folder that holds ``monitor/``). Never raises: when neither
    has them (a damaged install) it returns where a wheel keeps them, so the caller's "not found" error
    names that place."""
    package = Path(str(files("monitor")))
    candidates = (package / SHIPPED_PACKAGE_DIR, package.parent)
    for base in candidates:
        if (base / _MARKER).is_dir():
            return base
    return candidates[0]


def require_dir(path: Path, what: str) -> Path:
    """``path`` when it is a folder, else a ``ConfigError`` saying which shipped folder is missing."""
    if not path.is_dir():
        raise ConfigError(f"the {what}/ folder is missing", path=str(path),
                          hint="reinstall lotwarden from its wheel, or `pip install -e .` in the source folder")
    return path


def shipped_templates_dir() -> Path:
    """The shipped alert templates (``config/templates/``)."""
    return shipped_root() / "config" / "templates"


def demo_feeds_dir() -> Path:
    """The demo scenario's sample exports (``sample_feeds/``)."""
    return shipped_root() / "sample_feeds"


def demo_rules_dir() -> Path:
    """The demo scenario's rule files (``rules/``)."""
    return shipped_root() / "rules"


def sample_config_path() -> Path:
    """The sample daemon config (``config/lotwarden.toml``; its relative paths point at the folders above)."""
    return shipped_root() / "config" / "lotwarden.toml"
