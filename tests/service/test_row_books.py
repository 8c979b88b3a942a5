"""Row books: a day's update counts only the rows since each filter state was written.

Reference twin: the whole-history counts (``read_meta(verify=True)``, the aggregate over
every stored row that the books replace) must give the same RowInfo, vintages and latest
warning codes after every kind of drop: new days, a late row dated inside the history, a
revised value, and rows written around the ingest.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from drop_helpers import drop as _drop
from drop_helpers import returns_sql as _returns_sql

from tracker.ingest import process_inbox
from tracker.service.estimate import _plan, update
from tracker.service.estimate_io import read_meta




def _both(store):
    with store.connect() as con:
        fast = read_meta(con)
        exact = read_meta(con, verify=True)
    return fast, exact


def _assert_books_hold(store, config):
    fast, exact = _both(store)
    assert fast.rows == exact.rows
    assert fast.vintages == exact.vintages
    assert fast.latest_codes == exact.latest_codes
    return fast, exact


def test_books_give_the_whole_history_counts_after_every_kind_of_drop(empty_store):
    store, config = empty_store
    inbox = config.inbox_path(store.folder)
    rng = np.random.default_rng(21)
    dates = pd.bdate_range("2021-01-01", periods=520)
    hole = dates[300]                                   # a day left out, filled in late
    a = rng.normal(3e-4, 0.008, dates.size)
    b = rng.normal(0.0, 0.006, dates.size)
    keep = dates != hole
    _drop(inbox, "history.sql",
          "INSERT INTO factors (factor_id, label, frequency) VALUES ('AAA', 'A', 'daily'), ('BBB', 'B', 'daily');\n"
          + _returns_sql("AAA", dates[keep][:-3], a[keep][:-3]) + _returns_sql("BBB", dates[keep][:-3], b[keep][:-3]))
    assert [o.outcome for o in process_inbox(store, config)] == ["applied"]
    update(store, config)
    fast, _ = _assert_books_hold(store, config)
    assert set(fast.books) >= {("AAA", "premium"), ("BBB", "premium")}

    # new days through the ingest: an advance, counted from the books
    _drop(inbox, "day1.sql", _returns_sql("AAA", dates[-3:-2], a[-3:-2]) + _returns_sql("BBB", dates[-3:-2], b[-3:-2]))
    process_inbox(store, config)
    fast, _ = _assert_books_hold(store, config)
    assert {p.kind for p in _plan(fast, config, None, None)} == {"advance"}
    update(store, config)
    _assert_books_hold(store, config)

    # a late row dated inside AAA's history: the book no longer holds, the factor is re-derived
    _drop(inbox, "late.sql", _returns_sql("AAA", [hole], [a[300]]))
    process_inbox(store, config)
    fast, _ = _assert_books_hold(store, config)
    plans = {p.factor_id: p for p in _plan(fast, config, None, None)}
    assert plans["AAA"].kind == "rederive" and "inserted" in plans["AAA"].reason
    assert "BBB" not in plans
    update(store, config)
    _assert_books_hold(store, config)

    # a revised value: re-derived from the revised date on, counts unchanged
    _drop(inbox, "revise.sql", _returns_sql("BBB", dates[400:401], b[400:401] + 0.01))
    process_inbox(store, config)
    fast, _ = _assert_books_hold(store, config)
    plans = {p.factor_id: p for p in _plan(fast, config, None, None)}
    assert plans["BBB"].kind == "rederive" and plans["BBB"].reason == "revision"
    update(store, config)
    fast, _ = _assert_books_hold(store, config)

    # rows written around the ingest after the state's date are still seen (by date)
    with store.transaction() as con:
        con.execute("INSERT INTO factor_returns (factor_id, date, ret) VALUES ('AAA', ?, ?)",
                    [dates[-2].date(), float(a[-2])])
    fast, exact = _assert_books_hold(store, config)
    assert fast.rows["AAA"].n_rows == exact.rows["AAA"].n_rows == dates.size - 1   # all but the last day


def test_a_refit_request_recounts_what_a_book_missed(empty_store):
    """A late row written around the ingest (no drop id) is not seen by the books; the
    counts of a refit request are whole-history ones and see it."""
    store, config = empty_store
    inbox = config.inbox_path(store.folder)
    rng = np.random.default_rng(22)
    dates = pd.bdate_range("2021-01-01", periods=480)
    x = rng.normal(2e-4, 0.007, dates.size)
    _drop(inbox, "history.sql", "INSERT INTO factors (factor_id, label, frequency) VALUES ('CCC', 'C', 'daily');\n"
          + _returns_sql("CCC", dates[1:], x[1:]))
    process_inbox(store, config)
    update(store, config)
    with store.transaction() as con:
        con.execute("INSERT INTO factor_returns (factor_id, date, ret) VALUES ('CCC', ?, ?)", [dates[0].date(), float(x[0])])
    fast, exact = _both(store)
    assert fast.rows["CCC"].n_rows == dates.size - 1          # the book's count (documented limit)
    assert exact.rows["CCC"].n_rows == dates.size
    plans = {p.factor_id: p for p in _plan(exact, config, set(), None)}
    assert plans["CCC"].kind == "rederive"


def test_codes_at_a_day_read_from_the_end_equal_a_scan_of_every_row():
    """The codes booked for a factor's newest stored date: _codes_at reads back from the
    end of the date-ordered rows; a scan of every row is its reference twin, including
    rows after the day (a last row whose return is missing is not stored, so the newest
    stored date is earlier) and dates given as text."""
    from tracker.service.estimate_latest import _codes_at

    days = np.datetime64("2020-01-01") + np.arange(6)
    rows = [{"date": days[i], "code": c} for i, c in
            [(0, "NOISE"), (1, "NOISE"), (3, "NOISE"), (3, "OUTLIER"), (4, "STALE"), (5, "FDR")]]
    rows.insert(2, {"date": "2020-01-02", "code": "REGIME_AMBIG"})
    for day in list(days) + [np.datetime64("2019-12-31"), np.datetime64("2020-02-01")]:
        every = {r["code"] for r in rows if np.datetime64(r["date"], "D") == day}
        assert _codes_at(rows, day) == every
    assert _codes_at(rows, days[3]) == {"NOISE", "OUTLIER"}
    assert _codes_at(rows, days[1]) == {"NOISE", "REGIME_AMBIG"}
