"""A user's own store: empty, fed by drop files, with a series too short to estimate."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
from drop_helpers import drop as _drop
from drop_helpers import returns_sql as _returns_sql

from tracker.ingest import process_inbox
from tracker.service.estimate import update
from tracker.service.views import load_board




def test_short_series_is_reported_as_too_little_data_never_as_a_number(empty_store):
    store, config = empty_store
    inbox = config.inbox_path(store.folder)
    rng = np.random.default_rng(7)
    long_dates = pd.bdate_range("2020-01-01", periods=600)
    short_dates = long_dates[-40:]
    text = (
        "INSERT INTO factors (factor_id, label, frequency) VALUES ('LONGF', 'Long history', 'daily'),"
        " ('SHORTF', 'Short history', 'daily');\n"
        + _returns_sql("LONGF", long_dates, rng.normal(3e-4, 0.008, len(long_dates)))
        + _returns_sql("SHORTF", short_dates, rng.normal(0.0, 0.006, len(short_dates)))
    )
    _drop(inbox, "history.sql", text)
    outcomes = process_inbox(store, config)
    assert [o.outcome for o in outcomes] == ["applied"]
    summary = update(store, config)
    assert summary.kinds["LONGF"] == "backfill" and summary.kinds["SHORTF"] == "backfill"
    rows = {r.factor_id: r for r in load_board(store, config).rows}
    assert rows["LONGF"].fit_status == "ok" and math.isfinite(rows["LONGF"].premium_ann)
    short = rows["SHORTF"]
    assert short.fit_status == "too_little_data"
    assert not math.isfinite(short.premium_ann)  # no number is shown for it
    assert "FIT_FAILED" in short.codes


def test_an_advance_never_fits_on_the_new_rows_alone(empty_store):
    """Regression: a model without usable parameters was refitted on the new rows only
    ('too_little_data: 1 rows'). Advances filter; only refits estimate, on the whole history."""
    store, config = empty_store
    inbox = config.inbox_path(store.folder)
    rng = np.random.default_rng(8)
    dates = pd.bdate_range("2021-01-01", periods=200)
    long_vals = rng.normal(3e-4, 0.008, len(dates))
    short_vals = rng.normal(0.0, 0.006, len(dates))
    text = (
        "INSERT INTO factors (factor_id, label, frequency) VALUES ('LONGF', 'Long', 'daily'),"
        " ('SHORTF', 'Short', 'daily');\n"
        + _returns_sql("LONGF", dates[:100], long_vals[:100])
        + _returns_sql("SHORTF", dates[60:100], short_vals[60:100])
    )
    _drop(inbox, "a.sql", text)
    process_inbox(store, config)
    update(store, config)
    # one more day: an advance for both
    _drop(inbox, "b.sql", _returns_sql("LONGF", dates[100:101], long_vals[100:101])
          + _returns_sql("SHORTF", dates[100:101], short_vals[100:101]))
    process_inbox(store, config)
    summary = update(store, config)
    assert summary.kinds["SHORTF"] == "advance"
    with store.connect() as con:
        fits = con.execute("SELECT model, status, n_obs FROM model_fits WHERE subject_id = 'SHORTF' "
                           "AND is_current ORDER BY model").fetchall()
    assert all(n >= 40 for _, _, n in fits), fits
    # enough history now: the short factor is refit on all of it and gets numbers
    _drop(inbox, "c.sql", _returns_sql("SHORTF", dates[101:200], short_vals[101:200])
          + _returns_sql("LONGF", dates[101:200], long_vals[101:200]))
    process_inbox(store, config)
    summary = update(store, config)
    assert summary.kinds["SHORTF"] == "refit"
    rows = {r.factor_id: r for r in load_board(store, config).rows}
    assert rows["SHORTF"].fit_status == "ok" and math.isfinite(rows["SHORTF"].premium_ann)
