"""Where the store lives: ``--store``, then ``TRACKER_STORE``, then the per-user data folder."""

from __future__ import annotations

import os
from pathlib import Path

import platformdirs

APP_NAME = "premium-tracker"
STORE_FILE = "store.duckdb"


def default_store_path() -> Path:
    return platformdirs.user_data_path(APP_NAME, appauthor=False) / STORE_FILE


def default_demo_store_path() -> Path:
    return platformdirs.user_data_path(APP_NAME, appauthor=False) / "demo" / STORE_FILE


def resolve_store_path(option: str | None) -> Path:
    """The store file named by the option, the environment, or the default, in that order."""
    chosen = option or os.environ.get("TRACKER_STORE") or None
    path = Path(chosen).expanduser() if chosen else default_store_path()
    if path.suffix == "" and path.is_dir():
        path = path / STORE_FILE
    return path.absolute()
