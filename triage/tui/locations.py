"""Where triage keeps its configuration and finds its shipped files."""

from __future__ import annotations

import os
from importlib import resources
from importlib.resources.abc import Traversable
from pathlib import Path
from typing import Final

APP_DIR_NAME: Final = "triage"
"""Name of the folder under the XDG configuration directory."""

CONFIG_DIR_ENV: Final = "TRIAGE_CONFIG_DIR"
"""Environment variable that replaces the configuration directory (tests point it at a temp dir)."""

USER_KEYMAP_NAME: Final = "keymap.toml"
"""File name of the user's keymap inside the configuration directory."""


def config_dir() -> Path:
    """Return the configuration directory, creating it on first use.

    `TRIAGE_CONFIG_DIR` wins when set; otherwise `$XDG_CONFIG_HOME/triage`, falling back to
    `~/.config/triage` as the XDG base directory specification asks.

    Returns
    -------
    Path
        The directory (created if missing).
    """
    override = os.environ.get(CONFIG_DIR_ENV)
    if override:
        path = Path(override)
    else:
        base = os.environ.get("XDG_CONFIG_HOME") or str(Path.home() / ".config")
        path = Path(base) / APP_DIR_NAME
    path.mkdir(parents=True, exist_ok=True)
    return path


def user_keymap_path() -> Path:
    """Return the path of the user's keymap file (it may not exist)."""
    return config_dir() / USER_KEYMAP_NAME


def shipped_keymaps() -> Traversable:
    """Return the folder of keymaps shipped with triage.

    An installed package carries them as `triage.keymaps`; a source tree keeps them in the
    top-level `keymaps/` folder beside the package.

    Returns
    -------
    Traversable
        A folder holding `default.toml` and the alternative keymaps.
    """
    try:
        folder = resources.files("triage.keymaps")
    except ModuleNotFoundError:
        return Path(__file__).resolve().parents[2] / "keymaps"
    return folder
