"""Large files: a million rows and 50 MB, generated at run time (never committed)."""

from __future__ import annotations

import time

import duckdb
import numpy as np
import pandas as pd
import pytest
from ingest_helpers import TODAY, drop, fetch

from tracker.ingest import process_inbox
from tracker.ingest.sandbox import open_sandbox
from tracker.store.bootstrap import open_store


def big_file(n_assets: int, n_days: int, seed: int = 5) -> tuple[str, np.ndarray, pd.DatetimeIndex]:
    """Declarations of n_assets daily sleeves and n_assets x n_days returns, one INSERT."""
    days = pd.bdate_range(end="2026-11-27", periods=n_days)
    iso = days.strftime("%Y-%m-%d")
    vals = np.random.default_rng(seed).normal(0, 0.01, (n_assets, n_days))
    head = ("-- backfill\nINSERT INTO assets (asset_id, label, frequency) VALUES\n"
            + ",\n".join(f"('A{i:04d}', 'Sleeve {i}', 'daily')" for i in range(n_assets)) + ";\n"
            + "INSERT INTO asset_returns (asset_id, date, ret) VALUES\n")
    body = ",\n".join(
        ",\n".join(f"  ('A{i:04d}', DATE '{d}', {x:.10f})" for d, x in zip(iso, vals[i])) for i in range(n_assets))
    return head + body + ";\n", vals, days


def run_big(tmp_path, text):
    st, cfg = open_store(tmp_path / "big" / "store.duckdb", create_demo=False)
    drop(cfg.inbox_path(st.folder), "backfill.sql", text)
    t0 = time.perf_counter()
    [o] = process_inbox(st, cfg, today=TODAY)
    return st, o, time.perf_counter() - t0


def check_sample(st, vals, days, rng):
    for _ in range(20):
        i, j = int(rng.integers(vals.shape[0])), int(rng.integers(vals.shape[1]))
        got = fetch(st, "SELECT ret FROM asset_returns WHERE asset_id = ? AND date = ?",
                    [f"A{i:04d}", days[j].date()])
        assert got == [(float(f"{vals[i, j]:.10f}"),)]


@pytest.mark.slow
def test_one_million_rows(tmp_path, capsys):
    text, vals, days = big_file(400, 2500)
    st, o, seconds = run_big(tmp_path, text)
    assert o.outcome == "applied", o.reason
    assert o.rows_written == {"factors": 0, "assets": 400, "factor_returns": 0, "asset_returns": 1_000_000,
                              "risk_free": 0}
    assert fetch(st, "SELECT count(*), count(DISTINCT asset_id) FROM asset_returns") == [(1_000_000, 400)]
    check_sample(st, vals, days, np.random.default_rng(1))
    with capsys.disabled():
        print(f"\n1,000,000-row drop file ({len(text) / 1e6:.1f} MB): {seconds:.1f} s, "
              f"{1e6 / seconds:,.0f} rows/s end to end (parse, sandbox, validate, one transaction, move)")


@pytest.mark.slow
def test_fifty_megabytes_accepted_under_the_default_limit(tmp_path):
    text, vals, days = big_file(450, 2500, seed=6)
    assert len(text.encode()) >= 50_000_000
    st, o, _ = run_big(tmp_path, text)
    assert o.outcome == "applied", o.reason
    assert o.rows_written["asset_returns"] == 450 * 2500
    check_sample(st, vals, days, np.random.default_rng(2))


@pytest.mark.slow
def test_reading_is_faster_than_executing_the_inserts(tmp_path, capsys):
    # The reference: DuckDB parsing (extract_statements) and executing 1,000-row INSERT
    # statements in the sandbox, the straightforward path, on 100,000 rows.
    from tracker.ingest.sandbox import parse_drop

    days = pd.bdate_range(end="2026-11-27", periods=1000).strftime("%Y-%m-%d")
    vals = np.random.default_rng(9).normal(0, 0.01, 100_000)
    rows = [f"('A{k % 100:03d}', DATE '{days[k // 100]}', {vals[k]:.10f})" for k in range(100_000)]
    text = "\n".join("INSERT INTO asset_returns VALUES\n" + ",\n".join(rows[k:k + 1000]) + ";"
                     for k in range(0, len(rows), 1000))
    t0 = time.perf_counter()
    con = open_sandbox()
    for stmt in duckdb.extract_statements(text):
        con.execute(stmt).fetchall()
    reference = con.execute("SELECT ret FROM asset_returns ORDER BY rowid").fetchnumpy()["ret"]
    t_exec = time.perf_counter() - t0
    t0 = time.perf_counter()
    staged = parse_drop(text.encode())
    t_fast = time.perf_counter() - t0
    st = staged.tables["asset_returns"]
    got = st.values["ret"][np.lexsort((st.row, st.statement))]
    assert np.array_equal(got, np.asarray(reference))
    with capsys.disabled():
        print(f"\n100,000 rows: execute in sandbox {1e5 / t_exec:,.0f} rows/s, fast read {1e5 / t_fast:,.0f} rows/s")
    assert t_fast < t_exec / 2
