"""Helpers for the UI tests: the invented small history, drop files, waiting for workers."""

from __future__ import annotations

import asyncio
from datetime import date, datetime
from pathlib import Path

import numpy as np
import pandas as pd

from tracker.store.sqlfiles import sql

FACTORS = pd.DataFrame({
    "factor_id": ["ALPHA", "BETA", "GAMMA"],
    "label": ["Alpha sleeve", "Beta sleeve", "Gamma (proposed)"],
    "description": ["invented", "invented", "invented"],
    "frequency": ["daily"] * 3,
    "is_traded": [True] * 3,
    "is_new": [False, False, True],
    "start_date": [None] * 3,
})
N_STORED, N_EXTRA = 400, 10
FROZEN_AT = datetime(2024, 1, 3, 7, 30, 0)        # every stored timestamp shown on screen
CLOCK = datetime(2024, 1, 3, 7, 45, 0)            # the app's "now"


def _series() -> tuple[pd.DatetimeIndex, dict[str, np.ndarray]]:
    rng = np.random.default_rng(20240601)
    n = N_STORED + 1 + N_EXTRA
    dates = pd.bdate_range("2022-06-01", periods=n)
    t = np.arange(n)
    vol = np.where((t > 150) & (t < 250), 2.5, 1.0)      # a turbulent stretch for BETA's regimes
    rets = {
        "ALPHA": 0.0005 + 0.008 * rng.standard_normal(n),
        "BETA": 0.0002 + 0.010 * vol * rng.standard_normal(n),
        "GAMMA": -0.0002 + 0.006 * rng.standard_normal(n),
    }
    return dates, rets


DATES, RETURNS = _series()


def day(i: int) -> date:
    """The i-th business day of the invented history (0-based)."""
    return DATES[i].date()


def drop_text(i: int, *, big_move: bool = False) -> str:
    """A drop file with day ``i`` for every factor, in the documented drop format."""
    iso = day(i).isoformat()
    vals = {k: float(v[i]) for k, v in RETURNS.items()}
    if big_move:
        vals["ALPHA"] = 0.2
    rows = ",\n".join(f"  ('{k}', DATE '{iso}', {v:.10f})" for k, v in vals.items())
    return f"-- invented test data for {iso}\nINSERT INTO factor_returns (factor_id, date, ret) VALUES\n{rows};\n"


def write_drop(inbox: Path, name: str, text: str) -> Path:
    """Write under a hidden name and rename, as upstream jobs must."""
    tmp = inbox / f".{name}.tmp"
    tmp.write_text(text, "utf-8")
    target = inbox / name
    tmp.replace(target)
    return target


def insert_day(store, i: int) -> None:
    frame = pd.DataFrame({"factor_id": list(RETURNS), "date": [day(i)] * 3,
                          "ret": [float(v[i]) for v in RETURNS.values()]})
    with store.transaction() as con:
        con.register("incoming_frame", frame)
        con.execute(sql("seed.factor_returns"))
        con.unregister("incoming_frame")


def freeze_timestamps(store) -> None:
    with store.transaction() as con:
        for stmt in (
            "UPDATE estimation_runs SET started_at = ?, finished_at = ?",
            "UPDATE model_fits SET fitted_at = ?",
            "UPDATE reviews SET reviewed_at = ?",
            "UPDATE drop_files SET received_at = ?, processed_at = ?",
        ):
            con.execute(stmt, [FROZEN_AT] * stmt.count("?"))


def make_app(store, config, **kw):
    from tracker.ui.app import TrackerApp

    return TrackerApp(store, config, clock=lambda: CLOCK, **kw)


async def settle(pilot, rounds: int = 4) -> None:
    """Wait for the first live pass (when live), then until the workers are done and their
    messages handled."""
    app = pilot.app
    if getattr(app, "live_enabled", False) and app.passes_done == 0:
        await wait_until(pilot, lambda: app.passes_done >= 1)
    for _ in range(rounds):
        await pilot.app.workers.wait_for_complete()
        await pilot.pause()
    await pilot.pause()


async def wait_until(pilot, predicate, timeout: float = 30.0) -> None:
    loop = asyncio.get_running_loop()
    deadline = loop.time() + timeout
    while not predicate():
        if loop.time() > deadline:
            raise AssertionError("condition not met in time")
        await pilot.app.workers.wait_for_complete()
        await pilot.pause(0.05)


def run_async(fn):
    """Run an async test body with asyncio (no async pytest plugin is installed)."""
    import functools

    @functools.wraps(fn)
    def wrapper(*args, **kwargs):
        return asyncio.run(fn(*args, **kwargs))

    return wrapper
