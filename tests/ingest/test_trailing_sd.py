"""The reference sd of the magnitude rule: the recent-window lookup equals the
whole-history window query it replaced, for every kind of series (its reference twin)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pyarrow as pa

from tracker.ingest.apply import TRAILING_WINDOW_DAYS, _trailing_sd
from tracker.ingest.validate import TRAILING_ROWS
from tracker.store.bootstrap import open_store
from tracker.store.sqlfiles import sql


def _exact(con, ids):
    con.register("incoming_frame", pa.table({"id": pa.array(ids, pa.string())}))
    try:
        return con.execute(sql("ingest.trailing_factor_sd"), [TRAILING_ROWS]).df().set_index("id")
    finally:
        con.unregister("incoming_frame")


def test_recent_window_equals_whole_history_query(tmp_path):
    store, _ = open_store(tmp_path / "s" / "store.duckdb", create_demo=False)
    rng = np.random.default_rng(11)
    end = pd.Timestamp("2026-10-30")
    series = {
        "LONG": pd.bdate_range(end=end, periods=400),            # answered by the window
        "SHORT": pd.bdate_range(end=end, periods=30),             # fewer rows than TRAILING_ROWS
        "STALE": pd.bdate_range(end=end - pd.Timedelta(days=400), periods=300),  # ended long ago
        "GAPPY": pd.bdate_range(end=end, periods=400)[::3],       # sparse inside the window
        "MON": pd.date_range(end=end, periods=120, freq="ME"),    # monthly
    }
    frames = []
    for fid, days in series.items():
        frames.append(pd.DataFrame({"factor_id": fid, "date": days.date,
                                    "ret": rng.normal(0, 0.01, days.size)}))
    data = pd.concat(frames)
    with store.connect() as con:
        for fid in series:
            freq = "monthly" if fid == "MON" else "daily"
            con.execute("INSERT INTO factors (factor_id, label, frequency) VALUES (?, ?, ?)", [fid, fid, freq])
        con.register("incoming_frame", data)
        con.execute("INSERT INTO factor_returns (factor_id, date, ret) SELECT factor_id, date, ret FROM incoming_frame")
        con.unregister("incoming_frame")
        ids = [*series, "UNKNOWN"]
        got = _trailing_sd(con, "factor", ids).sort_index()
        want = _exact(con, ids).sort_index()
    assert list(got.index) == list(want.index) == sorted(series)
    np.testing.assert_allclose(got["sd"].to_numpy(), want["sd"].to_numpy(), rtol=1e-12)
    assert got["n"].tolist() == want["n"].tolist()
    # the long series is answered by the window itself: its 63 rows fit in TRAILING_WINDOW_DAYS
    assert TRAILING_ROWS / 5 * 7 < TRAILING_WINDOW_DAYS
    assert int(got.loc["LONG", "n"]) == TRAILING_ROWS
