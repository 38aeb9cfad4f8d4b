"""monitor.resources in the checkout (editable install): the shipped folders are the checkout's own."""

from __future__ import annotations

from pathlib import Path

import pytest

from monitor import resources
from monitor.errors import ConfigError

REPO = Path(__file__).resolve().parent.parent


def test_checkout_layout_points_at_the_top_level_folders() -> None:
    """Without a wheel's monitor/_shipped/, every shipped thing is the checkout's top-level folder or file."""
    assert not (REPO / "monitor" / resources.SHIPPED_PACKAGE_DIR).exists()
    assert resources.shipped_templates_dir() == REPO / "config" / "templates"
    assert resources.demo_feeds_dir() == REPO / "sample_feeds"
    assert resources.demo_rules_dir() == REPO / "rules"
    assert resources.sample_config_path() == REPO / "config" / "lotwarden.toml"
    assert (resources.shipped_templates_dir() / "hold.subject.txt").is_file()


def test_a_missing_shipped_folder_is_a_clear_error(tmp_path: Path) -> None:
    """require_dir names the folder it looked for and how to get it back."""
    with pytest.raises(ConfigError) as err:
        resources.require_dir(tmp_path / "sample_feeds", "sample_feeds")
    text = str(err.value)
    assert str(tmp_path / "sample_feeds") in text and "sample_feeds/ folder is missing" in text
    assert "reinstall" in text
    assert resources.require_dir(tmp_path, "x") == tmp_path
