"""A refit of many factors is written in chunks (bounded memory): the same store as one write.

Reference twin: the same refit written in one transaction (``STREAM_CHUNK`` above the
number of factors). Every estimate, warning, fit record and filter state must be
identical, for a first estimation (backfill of every factor, market included) and for a
refit of everything.
"""

from __future__ import annotations

import pandas as pd

from tracker.service import estimate as est
from tracker.service.bench_data import load_panel, make_panel
from tracker.service.executor import SerialExecutor
from tracker.store.bootstrap import open_store

TABLES = {
    "model_fits": "SELECT * EXCLUDE (fit_id, fitted_at) FROM model_fits ORDER BY ALL",
    "premium_estimates": "SELECT * EXCLUDE (computed_at, fit_id) FROM premium_estimates ORDER BY ALL",
    "regime_estimates": "SELECT * EXCLUDE (computed_at, fit_id) FROM regime_estimates ORDER BY ALL",
    "warnings": "SELECT * EXCLUDE (computed_at) FROM warnings ORDER BY ALL",
    "filter_states": "SELECT subject_id, model, through_date, state_json FROM filter_states ORDER BY ALL",
    "runs": "SELECT kind, reason, subjects, from_date, through_date, status FROM estimation_runs ORDER BY ALL",
}


def _estimated(folder, chunk, monkeypatch):
    monkeypatch.setattr(est, "STREAM_CHUNK", chunk)
    store, config = open_store(folder / "store.duckdb", create_demo=False)
    load_panel(store, make_panel(7, 400, seed=5))
    first = est.update(store, config, executor=SerialExecutor())
    again = est.update(store, config, refit=set(), executor=SerialExecutor())
    with store.connect() as con:
        tables = {name: con.execute(q).df() for name, q in TABLES.items()}
        version = con.execute("SELECT value FROM store_meta WHERE key = 'estimates_version'").fetchone()[0]
    return first, again, tables, int(version)


def test_chunked_refit_writes_what_one_write_does(tmp_path, monkeypatch):
    one = _estimated(tmp_path / "one", 100, monkeypatch)
    chunked = _estimated(tmp_path / "chunked", 2, monkeypatch)
    assert one[0].kinds == chunked[0].kinds and set(one[0].kinds.values()) >= {"backfill"}
    assert one[0].rows_written == chunked[0].rows_written == 7 * 400
    assert one[1].rows_written == chunked[1].rows_written
    assert "*market*" in chunked[0].kinds                 # the market is written too
    for name in TABLES:
        pd.testing.assert_frame_equal(one[2][name], chunked[2][name], check_exact=True, obj=name)
    assert len(one[2]["premium_estimates"]) == 7 * 400
    # each chunk is its own transaction: 4 writes for 7 factors in chunks of 2 (3 full
    # chunks, the first with the market, then the rest), against 1 (the version counts
    # writes)
    assert chunked[3] - one[3] == 2 * 3


def test_refits_leave_one_current_fit_per_factor_and_model(tmp_path, monkeypatch):
    """A write stores all of its new fits at once (ids, the fits they replace, the rows):
    after a first estimation and two refits, each factor and model has exactly one
    current fit, the newest, and every fit has its own id."""
    _estimated(tmp_path / "s", 100, monkeypatch)
    store, config = open_store(tmp_path / "s" / "store.duckdb", create_demo=False)
    est.update(store, config, refit=set(), executor=SerialExecutor())
    with store.connect() as con:
        rows = con.execute("SELECT subject_id, model, fit_id, is_current FROM model_fits").fetchall()
    assert len({r[2] for r in rows}) == len(rows)
    by_key: dict = {}
    for subject, model, fit_id, current in rows:
        by_key.setdefault((subject, model), []).append((fit_id, current))
    assert len(by_key) >= 7 * 3
    for key, fits in by_key.items():
        assert len(fits) == 3, key                               # first estimation, 2 refits
        assert [c for _, c in sorted(fits)] == [False, False, True], key


def test_a_market_with_no_candidate_to_fit_does_not_hold_back_the_chunks(tmp_path, monkeypatch):
    """Six market states on 300 days of 7 factors: every candidate has too little data, so
    the market fit has no EM run to wait for. Its failure is the market's fit at once: the
    refit still writes in chunks (4 writes for 7 factors in chunks of 2) and records it."""
    from tracker.config import config_from_dict

    monkeypatch.setattr(est, "STREAM_CHUNK", 2)
    store, _ = open_store(tmp_path / "store.duckdb", create_demo=False)
    config = config_from_dict({"models": {"market_states_min": 6, "market_states_max": 6}})
    load_panel(store, make_panel(7, 300, seed=5))
    summary = est.update(store, config, executor=SerialExecutor())
    assert summary.rows_written == 7 * 300
    with store.connect() as con:
        version = con.execute("SELECT value FROM store_meta WHERE key = 'estimates_version'").fetchone()[0]
        status, message = con.execute("SELECT status, message FROM model_fits WHERE subject_id = '*market*' "
                                      "AND is_current").fetchone()
    assert int(version) == 4
    assert status == "too_little_data" and "6 states" in message
