"""The other screens with Pilot: factor detail, inbox, help, assets, the palette, refit;
and the key policy (every action on a plain key, nothing only on F-keys or modifiers)."""

from __future__ import annotations

import re

import pytest
from rich.console import Console
from textual.binding import Binding
from textual.widgets import DataTable, Static
from ui_helpers import make_app, run_async, settle, wait_until

from tracker.service.views import CAUTION, load_board, load_detail, load_drops
from tracker.ui.app import TrackerApp
from tracker.ui.assets import AssetsScreen
from tracker.ui.board import BoardScreen, BoardTable
from tracker.ui.confirm import ConfirmScreen
from tracker.ui.detail import WINDOWS, DetailScreen, window_rows
from tracker.ui.help import GLOSSARY, HelpScreen, key_name
from tracker.ui.inbox import InboxScreen


def text_of(widget: Static, width: int = 200) -> str:
    """What a Static shows, rendered as plain text (tables included)."""
    console = Console(width=width, color_system=None, record=True)
    console.print(widget.content)
    return console.export_text()


@run_async
async def test_detail_windows_hindsight_warnings_and_fits(small_store):
    store, config = small_store
    board = load_board(store, config)
    fid = max(board.rows, key=lambda r: len(r.codes)).factor_id      # the factor with most warnings
    app = make_app(store, config)
    async with app.run_test(size=(80, 24)) as pilot:
        await settle(pilot)
        app.screen.open_detail(fid)
        await settle(pilot)
        scr = app.screen
        assert isinstance(scr, DetailScreen) and scr.detail.factor_id == fid
        default = WINDOWS[scr.window]
        assert default[0] == "3y"
        full = load_detail(store, fid, window_days=10**9)
        assert scr.detail.dates.size == min(full.dates.size, window_rows(default[1], "daily"))
        await pilot.press("left", "left")                         # 3y -> 1y -> 6m
        await settle(pilot)
        assert WINDOWS[scr.window][0] == "6m"
        assert scr.detail.dates.size == window_rows(0.5, "daily") == 126
        assert scr.detail.dates[-1] == full.dates[-1]
        await pilot.press("w")                                   # cycles on: 1y
        await settle(pilot)
        assert WINDOWS[scr.window][0] == "1y" and scr.detail.dates.size == 252
        assert "HINDSIGHT" not in text_of(scr.query_one("#premium-legend", Static))
        await pilot.press("h")
        await settle(pilot)
        assert scr.detail.hindsight_ann is not None
        assert "HINDSIGHT" in text_of(scr.query_one("#premium-legend", Static))
        assert "HINDSIGHT" in text_of(scr.query_one("#premium-latest", Static))
        warnings = text_of(scr.query_one("#warnings", Static))
        for w in scr.detail.warnings:
            assert w["code"] in warnings and w["message"].split()[0] in warnings
            assert (w["source"] or "-").split()[0] in warnings
        fits = text_of(scr.query_one("#fits", Static))
        for f in scr.detail.fits:
            assert f["model"] in fits and f["status"] in fits
            if f["loglik"] == f["loglik"]:                           # not NaN
                assert f"{f['loglik']:.2f}" in fits
        regimes = text_of(scr.query_one("#regime-table", Static))
        for r in scr.detail.regimes:
            assert r["name"] in regimes and f"{r['duration']:.1f}" in regimes
        order = scr.order
        await pilot.press("n")
        await settle(pilot)
        assert scr.factor_id == order[(order.index(fid) + 1) % len(order)] == scr.detail.factor_id
        await pilot.press("b", "escape")
        await settle(pilot)
        assert isinstance(app.screen, BoardScreen)


@run_async
async def test_inbox_lists_outcomes_rows_warnings_and_reasons(small_store):
    pytest.importorskip("tracker.ingest.inbox", reason="the ingest layer is not installed")
    store, config = small_store
    drops = load_drops(store)
    assert {d.outcome for d in drops} == {"applied", "rejected"}
    app = make_app(store, config)
    async with app.run_test(size=(80, 24)) as pilot:
        await settle(pilot)
        await pilot.press("i")
        await settle(pilot)
        scr = app.screen
        assert isinstance(scr, InboxScreen)
        t = scr.query_one("#drops", DataTable)
        assert [r.key.value for r in t.ordered_rows] == [str(d.drop_id) for d in drops]   # newest first
        for d in drops:
            outcome = t.get_cell(str(d.drop_id), "outcome").plain
            assert d.outcome in outcome
            assert t.get_cell(str(d.drop_id), "rows").plain == str(sum(d.rows.values()))
        rejected = next(d for d in drops if d.outcome == "rejected")
        applied = next(d for d in drops if d.outcome == "applied")
        t.move_cursor(row=t.get_row_index(str(rejected.drop_id)))
        await pilot.pause()
        info = text_of(scr.query_one("#drop-info", Static))
        assert rejected.reason.split(" (rule")[0][:40] in info.replace("\n", " ")
        t.move_cursor(row=t.get_row_index(str(applied.drop_id)))
        await pilot.pause()
        info = text_of(scr.query_one("#drop-info", Static))
        assert applied.warnings and applied.warnings[0]["code"] in info
        await pilot.press("escape")
        assert isinstance(app.screen, BoardScreen)


@run_async
async def test_help_lists_every_key_the_glossary_and_the_caution(small_store):
    store, config = small_store
    app = make_app(store, config)
    async with app.run_test(size=(80, 24)) as pilot:
        await settle(pilot)
        await pilot.press("question_mark")
        scr = app.screen
        assert isinstance(scr, HelpScreen)
        text = "\n".join(text_of(w, 78) for w in scr.query(Static))
        flat = " ".join(text.split())
        for cls in (TrackerApp, BoardScreen, BoardTable, DetailScreen, InboxScreen):
            for b in cls.BINDINGS:
                b = b if isinstance(b, Binding) else Binding(*b)
                if b.key == "ctrl+p" or b.action == "open_detail":
                    continue
                assert " ".join((b.tooltip or b.description).split()) in flat, b
                assert key_name(b.key) in text
        for term in ("Kalman filter", "Hamilton", "Kim filter", "Newey & West", "Lo (2002)",
                     "Probabilistic Sharpe", "Holm", "Benjamini & Yekutieli", "Harvey, Liu & Zhu", "1/(1-p_ii)"):
            assert term in flat, term
        assert all(name in flat for name, _, _ in GLOSSARY)
        assert " ".join(CAUTION.split()) in flat
        await pilot.press("escape")
        assert isinstance(app.screen, BoardScreen)


@run_async
async def test_assets_screen_says_why_it_is_empty(small_store):
    store, config = small_store                     # the small store declares no assets
    app = make_app(store, config)
    async with app.run_test(size=(80, 24)) as pilot:
        await settle(pilot)
        await pilot.press("a")
        await settle(pilot)
        assert isinstance(app.screen, AssetsScreen)
        info = text_of(app.screen.query_one("#asset-info", Static))
        try:
            from tracker.service.assets import load_assets_view
        except ImportError:
            assert "not available yet" in info
        else:
            assert " ".join(load_assets_view(store, config).message.split()) in " ".join(info.split())
        await pilot.press("escape")
        assert isinstance(app.screen, BoardScreen)


@run_async
async def test_command_palette_opens_on_a_letter_and_runs_board_commands(small_store):
    store, config = small_store
    board = load_board(store, config)
    app = make_app(store, config)
    async with app.run_test(size=(80, 24)) as pilot:
        await settle(pilot)
        await pilot.press("p")
        await pilot.pause()
        from textual.command import CommandPalette

        assert isinstance(app.screen, CommandPalette)
        await pilot.press(*"sort by premium")
        await pilot.pause(0.3)
        await pilot.press("enter")
        await settle(pilot)
        assert isinstance(app.screen, BoardScreen) and app.screen.sort.key == "premium"
        keys = [r.key.value for r in app.screen.query_one("#board", DataTable).ordered_rows]
        assert keys == [r.factor_id for r in sorted(board.rows, key=lambda r: -r.premium_ann)]


@run_async
async def test_refit_on_request_runs_in_the_background_with_progress(small_store):
    store, config = small_store
    fits_before = {(f["model"], f["fitted_at"]) for f in load_detail(store, "BETA").fits}
    app = make_app(store, config)
    seen = []
    async with app.run_test(size=(80, 24)) as pilot:
        await settle(pilot)
        original = app.live.on_activity                # what the worker reports, as it reports it

        def spy(text, done, total, busy):
            seen.append((text, done, total))
            original(text, done, total, busy)

        app.live.on_activity = spy
        await pilot.press("r")
        assert isinstance(app.screen, ConfirmScreen)
        await pilot.press("y")
        await wait_until(pilot, lambda: app.passes_done >= 2 and not app.live.refit_pending(), timeout=120)
        await settle(pilot)
        assert any(total and "refitting" in text for text, _, total in seen)
        assert any(done == total and total for _, done, total in seen)
        assert "refit" in app.activity_text
    fits_after = {(f["model"], f["fitted_at"]) for f in load_detail(store, "BETA").fits}
    assert fits_after != fits_before                  # the fixture froze fitted_at; a refit stamps a new time


ALLOWED_KEYS = re.compile(r"^([a-z]|up|down|left|right|enter|escape|slash|question_mark)$")


def test_every_action_is_on_a_plain_key():
    """Letters, arrows, Enter, Escape, / and ?; an F-key or modifier may only be an extra."""
    from tracker.ui.help import key_sections

    classes = [TrackerApp, BoardScreen, BoardTable, DetailScreen, InboxScreen, HelpScreen, AssetsScreen, ConfirmScreen]
    for cls in classes:
        by_action: dict[str, list[str]] = {}
        for b in cls.BINDINGS:
            b = b if isinstance(b, Binding) else Binding(*b)
            for key in b.key.split(","):
                by_action.setdefault(b.action, []).append(key.strip())
        for action, keys in by_action.items():
            assert any(ALLOWED_KEYS.match(k) for k in keys), (cls.__name__, action, keys)
    assert TrackerApp.COMMAND_PALETTE_BINDING == "p"
    assert key_sections()                                       # the help reads the same bindings
