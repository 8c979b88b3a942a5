"""The board, driven with Pilot at 80x24 and 160x45: rows, header, sorting, filtering,
review marks and live updates that keep the cursor where it was.

Expected values come from the service layer (`load_board`) on the same store, never
from copies of this UI's own output.
"""

from __future__ import annotations

import math

import pytest
from textual.widgets import DataTable, Input, Static
from ui_helpers import N_STORED, day, drop_text, insert_day, make_app, run_async, settle, wait_until, write_drop

from tracker.service.views import load_board
from tracker.ui import formatting as fmt
from tracker.ui.board import SORTS, BoardScreen
from tracker.ui.detail import DetailScreen


def table_keys(app) -> list[str]:
    return [r.key.value for r in app.screen.query_one("#board", DataTable).ordered_rows]


def cell(app, key: str, column: str) -> str:
    t = app.screen.query_one("#board", DataTable)
    v = t.get_cell(key, column)
    return v.plain if hasattr(v, "plain") else str(v)


def static_text(app, selector: str) -> str:
    c = app.screen.query_one(selector, Static).content
    return c.plain if hasattr(c, "plain") else str(c)


@run_async
async def test_board_at_80x24_shows_every_factor_and_the_header(small_store):
    store, config = small_store
    board = load_board(store, config)
    app = make_app(store, config)
    async with app.run_test(size=(80, 24)) as pilot:
        await settle(pilot)
        assert isinstance(app.screen, BoardScreen)
        assert table_keys(app) == sorted(r.factor_id for r in board.rows)
        for r in board.rows:
            assert cell(app, r.factor_id, "last") == r.last_date.isoformat()
            assert cell(app, r.factor_id, "prem") == fmt.pct(r.premium_ann)
            assert cell(app, r.factor_id, "band") == fmt.band(r.band_lo, r.band_hi)
            assert cell(app, r.factor_id, "t") == fmt.num(r.t_stat, signed=True)
            assert cell(app, r.factor_id, "regime") == fmt.regime_cell(r.regime_label, r.regime_prob, short=True)
            assert cell(app, r.factor_id, "warn").startswith(fmt.severity_mark(r.worst) if r.codes else "")
            assert cell(app, r.factor_id, "factor") == (fmt.change_mark(r.changes) or " ") + r.factor_id
        market = static_text(app, "#market")
        assert board.market.label in market and fmt.prob(board.market.probabilities[0]) in market
        store_line = static_text(app, "#store-line")
        assert board.header.last_data_date.isoformat() in store_line
        assert f"{board.header.pending_drops} waiting, {board.header.rejected_drops} rejected" in store_line
        assert "not investment advice" in static_text(app, "#caution")
        table = app.screen.query_one("#board", DataTable)
        # nothing essential cut off: the table fits across without a horizontal scrollbar
        assert table.virtual_size.width <= table.size.width
        assert not table.show_horizontal_scrollbar


@run_async
async def test_wide_terminal_shows_more_columns(small_store):
    store, config = small_store
    board = load_board(store, config)
    app = make_app(store, config)
    async with app.run_test(size=(160, 45)) as pilot:
        await settle(pilot)
        t = app.screen.query_one("#board", DataTable)
        keys = [c.key.value for c in t.columns.values()]
        assert {"name", "t", "ppos", "sharpe", "changes"} <= set(keys)
        for r in board.rows:
            assert cell(app, r.factor_id, "ppos") == fmt.num(r.p_positive, 3)
            assert cell(app, r.factor_id, "name") == r.label
            shown, full = cell(app, r.factor_id, "changes"), "; ".join(r.changes)
            assert shown == full or (shown.endswith("…") and full.startswith(shown[:-1]))
        assert t.virtual_size.width <= t.size.width
    async with make_app(store, config).run_test(size=(80, 24)) as pilot:
        await settle(pilot)
        keys = [c.key.value for c in pilot.app.screen.query_one("#board", DataTable).columns.values()]
        assert "name" not in keys and "sharpe" not in keys


@run_async
async def test_navigation_detail_and_back_keep_the_cursor(small_store):
    store, config = small_store
    app = make_app(store, config)
    async with app.run_test(size=(80, 24)) as pilot:
        await settle(pilot)
        await pilot.press("down", "down")
        t = app.screen.query_one("#board", DataTable)
        key = table_keys(app)[2]
        assert t.cursor_row == 2
        assert static_text(app, "#row-info").startswith(key)
        await pilot.press("enter")
        await settle(pilot)
        assert isinstance(app.screen, DetailScreen) and app.screen.factor_id == key
        await pilot.press("escape")
        await settle(pilot)
        assert isinstance(app.screen, BoardScreen)
        assert app.screen.query_one("#board", DataTable).cursor_row == 2


@run_async
async def test_sort_keys_follow_the_service_numbers(small_store):
    store, config = small_store
    board = load_board(store, config)
    app = make_app(store, config)
    async with app.run_test(size=(80, 24)) as pilot:
        await settle(pilot)
        await pilot.press("s")                                   # second sort key: premium, highest first
        assert app.screen.sort.key == SORTS[1].key == "premium"
        expected = [r.factor_id for r in sorted(board.rows, key=lambda r: -r.premium_ann)]
        assert table_keys(app) == expected
        await pilot.press("o")
        assert table_keys(app) == expected[::-1]
        for _ in range(len(SORTS) - 1):
            await pilot.press("s")
        assert app.screen.sort.key == "factor"
        assert table_keys(app) == sorted(expected)            # a new sort key starts in its own direction


@run_async
async def test_filter_by_text_and_by_warnings(small_store):
    store, config = small_store
    board = load_board(store, config)
    app = make_app(store, config)
    async with app.run_test(size=(80, 24)) as pilot:
        await settle(pilot)
        await pilot.press("slash")
        assert app.screen.query_one("#filter", Input).has_focus
        await pilot.press(*"gam")
        assert table_keys(app) == ["GAMMA"]
        await pilot.press("enter")                                # keeps the filter, back to the table
        assert app.screen.query_one("#board", DataTable).has_focus and table_keys(app) == ["GAMMA"]
        await pilot.press("escape")
        assert len(table_keys(app)) == len(board.rows)
        await pilot.press("slash", *"zz", "escape")           # Escape while typing clears too
        assert len(table_keys(app)) == len(board.rows)
        assert app.screen.query_one("#board", DataTable).has_focus
        assert not app.screen.query_one("#filter", Input).display
        await pilot.press("w")
        assert table_keys(app) == sorted(r.factor_id for r in board.rows if r.worst >= 2)
        await pilot.press("escape", "c")
        assert table_keys(app) == sorted(r.factor_id for r in board.rows if fmt.material_changes(r.changes))


@run_async
async def test_mark_reviewed_asks_then_clears_the_marks(small_store):
    store, config = small_store
    before = load_board(store, config)
    assert any(r.changes for r in before.rows)          # the fixture's review predates the last drop
    app = make_app(store, config)
    async with app.run_test(size=(80, 24)) as pilot:
        await settle(pilot)
        await pilot.press("m")
        await pilot.press("n")                                # asked, and refused: nothing stored
        await settle(pilot)
        assert load_board(store, config).header.last_review == before.header.last_review
        await pilot.press("m", "y")
        await settle(pilot)
        after = load_board(store, config)
        assert after.header.last_review > before.header.last_review
        assert all(not r.changes for r in after.rows)
        for r in after.rows:
            assert cell(app, r.factor_id, "factor") == " " + r.factor_id
        # the next data changes show against the new review
        insert_day(store, N_STORED + 1)
        await pilot.press("u")
        await settle(pilot)
        now = load_board(store, config)
        assert all("+1 rows" in r.changes for r in now.rows)
        for r in now.rows:
            assert cell(app, r.factor_id, "factor") == fmt.change_mark(r.changes) + r.factor_id
            assert fmt.change_mark(r.changes) == fmt.ROWS_MARK


async def _cursor_state(app):
    t = app.screen.query_one("#board", DataTable)
    return t.cursor_row, t.coordinate_to_cell_key(t.cursor_coordinate).row_key.value, t.scroll_y


@run_async
async def test_live_update_from_inserted_rows_keeps_cursor_and_scroll(small_store, monkeypatch):
    """The simulated variant: rows inserted and estimated by the test, the app picks them up."""
    from tracker.service.estimate import update

    store, config = small_store
    app = make_app(store, config)
    async with app.run_test(size=(80, 24)) as pilot:
        await settle(pilot)
        await pilot.press("down")
        before = await _cursor_state(app)
        t = app.screen.query_one("#board", DataTable)
        cleared = []
        monkeypatch.setattr(t, "clear", lambda *a, **k: cleared.append(a))   # never on a live update
        insert_day(store, N_STORED + 1)
        update(store, config)
        expected = load_board(store, config)
        await pilot.press("u")
        await wait_until(pilot, lambda: cell(app, "ALPHA", "last") == day(N_STORED + 1).isoformat())
        await settle(pilot)
        assert await _cursor_state(app) == before
        assert cleared == []
        for r in expected.rows:
            assert cell(app, r.factor_id, "prem") == fmt.pct(r.premium_ann)
            assert cell(app, r.factor_id, "last") == r.last_date.isoformat()


@run_async
async def test_live_update_from_a_drop_file(small_store, monkeypatch):
    """The real path: a file dropped into the inbox is applied, estimated and shown."""
    pytest.importorskip("tracker.ingest.inbox", reason="the ingest layer is not installed")
    store, config = small_store
    app = make_app(store, config)
    async with app.run_test(size=(80, 24)) as pilot:
        await settle(pilot)
        await pilot.press("down", "down")
        before = await _cursor_state(app)
        t = app.screen.query_one("#board", DataTable)
        monkeypatch.setattr(t, "clear", lambda *a, **k: pytest.fail("clear() on a live update"))
        old_version = load_board(store, config).version
        write_drop(config.inbox_path(store.folder), "next-day.sql", drop_text(N_STORED + 1))
        await pilot.press("u")
        await wait_until(pilot, lambda: cell(app, "GAMMA", "last") == day(N_STORED + 1).isoformat())
        await wait_until(pilot, lambda: app.board is not None and app.board.rows[0].estimate_date == day(N_STORED + 1))
        await settle(pilot)
        board = load_board(store, config)
        assert board.version != old_version
        assert all(r.estimate_date == day(N_STORED + 1) for r in board.rows)
        for r in board.rows:
            assert cell(app, r.factor_id, "prem") == fmt.pct(r.premium_ann)
        assert await _cursor_state(app) == before
        assert "drop file(s) applied" in app.activity_text or "1 drop" in app.activity_text


@run_async
async def test_missing_estimates_show_as_dashes_not_numbers(small_store):
    store, config = small_store
    app = make_app(store, config, live=False)
    async with app.run_test(size=(80, 24)) as pilot:
        from dataclasses import replace

        from tracker.ui.messages import BoardLoaded

        board = load_board(store, config)
        blank = replace(board.rows[0], premium_ann=math.nan, band_lo=math.nan, band_hi=math.nan, t_stat=math.nan,
                        p_positive=math.nan, regime=None, regime_prob=math.nan, codes=(), worst=0)
        app.post_message(BoardLoaded(replace(board, rows=(blank,) + board.rows[1:])))
        await settle(pilot)
        key = blank.factor_id
        assert cell(app, key, "prem") == "-" and cell(app, key, "band") == "-" and cell(app, key, "t") == "-"
        assert cell(app, key, "regime") == "-"


@run_async
async def test_scrolled_board_keeps_cursor_and_scroll_on_update(small_store):
    """Forty rows at 80x24: scroll to the bottom, then a new board changes every number."""
    from dataclasses import replace

    from tracker.ui.messages import BoardLoaded

    store, config = small_store
    base = load_board(store, config)
    template = base.rows[1]

    def board_with(shift: float):
        rows = tuple(replace(template, factor_id=f"F{i:02d}", premium_ann=0.01 * i + shift) for i in range(40))
        return replace(base, rows=rows, version=f"v{shift}")

    app = make_app(store, config, live=False)
    async with app.run_test(size=(80, 24)) as pilot:
        app.post_message(BoardLoaded(board_with(0.0)))
        await settle(pilot)
        for _ in range(33):
            await pilot.press("down")
        await settle(pilot)
        t = app.screen.query_one("#board", DataTable)
        assert t.scroll_y > 0
        before = (t.cursor_row, t.scroll_y, t.coordinate_to_cell_key(t.cursor_coordinate).row_key.value)
        app.post_message(BoardLoaded(board_with(0.5)))
        await settle(pilot)
        assert cell(app, "F33", "prem") == fmt.pct(0.33 + 0.5)
        assert (t.cursor_row, t.scroll_y, t.coordinate_to_cell_key(t.cursor_coordinate).row_key.value) == before


@run_async
async def test_t_and_probability_toggle_on_the_narrow_board(small_store):
    store, config = small_store
    board = load_board(store, config)
    app = make_app(store, config)
    async with app.run_test(size=(80, 24)) as pilot:
        await settle(pilot)
        await pilot.press("down")
        await pilot.press("t")
        t = app.screen.query_one("#board", DataTable)
        keys = [c.key.value for c in t.columns.values()]
        assert "ppos" in keys and "t" not in keys
        for r in board.rows:
            assert cell(app, r.factor_id, "ppos") == fmt.num(r.p_positive, 3)
        assert t.cursor_row == 1                           # rebuilt for the new column, cursor kept
        await pilot.press("t")
        assert "t" in [c.key.value for c in t.columns.values()]
