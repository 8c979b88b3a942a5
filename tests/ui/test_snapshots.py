"""SVG snapshots of the main screens on the small fixed store, at fixed sizes.

The store's timestamps are frozen by the fixture, the app's clock is injected and
animations are off, so a snapshot changes only when the screen does. Update them with
``python -m pytest tests/ui/test_snapshots.py --snapshot-update`` after checking the
differences in the report the plugin writes.
"""

from __future__ import annotations

import pytest
from ui_helpers import make_app, settle, wait_until

import tracker.ui.inbox as inbox_module


def _app(small_store):
    store, config = small_store
    app = make_app(store, config)
    app.animation_level = "none"
    return app


async def _ready(pilot):
    await wait_until(pilot, lambda: pilot.app.passes_done >= 1)     # the first live pass is over
    await settle(pilot)


def _then(*keys):
    async def run(pilot):
        await _ready(pilot)
        for k in keys:
            await pilot.press(k)
            await settle(pilot)
    return run


@pytest.mark.parametrize("size", [(80, 24), (160, 45)], ids=["80x24", "160x45"])
def test_board(snap_compare, small_store, size):
    assert snap_compare(_app(small_store), terminal_size=size, run_before=_ready)


@pytest.mark.parametrize("size", [(80, 24), (160, 45)], ids=["80x24", "160x45"])
def test_detail(snap_compare, small_store, size):
    assert snap_compare(_app(small_store), terminal_size=size, run_before=_then("down", "enter"))


def test_detail_with_hindsight_scrolled_to_warnings(snap_compare, small_store):
    keys = ("enter", "h") + ("down",) * 30
    assert snap_compare(_app(small_store), terminal_size=(80, 24), run_before=_then(*keys))


def test_inbox(snap_compare, small_store, monkeypatch):
    pytest.importorskip("tracker.ingest.inbox", reason="the ingest layer is not installed")
    monkeypatch.setattr(inbox_module, "inbox_location", lambda app: "<store folder>/inbox")
    assert snap_compare(_app(small_store), terminal_size=(80, 24), run_before=_then("i"))


def test_help(snap_compare, small_store):
    assert snap_compare(_app(small_store), terminal_size=(80, 24), run_before=_then("question_mark"))


def test_refit_question(snap_compare, small_store):
    assert snap_compare(_app(small_store), terminal_size=(80, 24), run_before=_then("r"))


def test_assets(snap_compare, small_store):
    assert snap_compare(_app(small_store), terminal_size=(80, 24), run_before=_then("a"))
