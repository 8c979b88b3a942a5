"""UI latency for ``tracker bench``: the Textual app run headless, and the service call behind it.

Measured on a store whose estimates are up to date:

* ``load_board_s`` -- :func:`tracker.service.views.load_board`, the one read that backs
  the board (always measured, also when the interface cannot be imported);
* ``startup_s`` -- from creating the app to the board showing a row for every factor
  (``App.run_test`` headless at 160 x 50, the live pass on, no inbox processing: the
  first pass loads the board, finds nothing to estimate, loads it again);
* ``cursor_down_s`` / ``sort_s`` -- from pressing the key to the app being idle again
  with the change on screen (the cursor on the next row; the rows re-sorted), i.e.
  the key's handling plus the refresh it causes.

The interface lives in :mod:`tracker.ui`; this module only drives it through
``run_test`` and its pilot, so it imports no Textual itself. When the interface
fails to start (it is under active development), the error is reported and only the
service timings are kept.
"""

from __future__ import annotations

import asyncio
import time

from tracker.config import Config
from tracker.store.connection import Store

SIZE = (160, 50)


def time_load_board(store: Store, config: Config, repeats: int = 3) -> dict:
    from tracker.service.views import load_board

    times, rows = [], 0
    for _ in range(repeats):
        t0 = time.perf_counter()
        board = load_board(store, config)
        times.append(time.perf_counter() - t0)
        rows = len(board.rows)
    return {"load_board_s": min(times), "load_board_runs_s": times, "board_rows": rows}


async def _drive(store: Store, config: Config, n_rows: int, timeout: float) -> dict:
    from tracker.ui.app import TrackerApp

    t0 = time.perf_counter()
    app = TrackerApp(store, config, live=True, ingest=None)
    out: dict = {"mode": "textual", "size": list(SIZE)}
    async with app.run_test(size=SIZE) as pilot:
        table = None
        while time.perf_counter() - t0 < timeout:
            await pilot.pause(0.02)
            screen = app.screen
            try:
                table = screen.query_one("#board")
            except Exception:
                continue
            if table.row_count >= n_rows:
                break
        out["startup_s"] = time.perf_counter() - t0
        if table is None or table.row_count < n_rows:
            out["error"] = f"the board showed {0 if table is None else table.row_count} of {n_rows} rows after {timeout:g} s"
            return out
        out["board_rows"] = table.row_count
        await pilot.pause()
        before = table.cursor_row
        t1 = time.perf_counter()
        await pilot.press("down")
        await pilot.pause()
        out["cursor_down_s"] = time.perf_counter() - t1
        out["cursor_moved"] = table.cursor_row == before + 1
        first = table.ordered_rows[0].key.value if table.row_count else None
        t2 = time.perf_counter()
        await pilot.press("s")
        await pilot.pause()
        out["sort_s"] = time.perf_counter() - t2
        out["sort_changed_order"] = (table.ordered_rows[0].key.value if table.row_count else None) != first
        app.live.stop.set()
    return out


def time_ui(store: Store, config: Config, n_rows: int, timeout: float = 120.0) -> dict:
    """Both measurements; the Textual part falls back to an error note when it cannot run."""
    out = time_load_board(store, config)
    try:
        out.update(asyncio.run(_drive(store, config, n_rows, timeout)))
    except Exception as exc:  # the interface is developed elsewhere; keep the service numbers
        out.update({"mode": "service_only", "error": f"{type(exc).__name__}: {exc}"})
    return out
