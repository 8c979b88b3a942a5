"""The command line as a user meets it on a new machine (real subprocesses)."""

from __future__ import annotations

import hashlib
import os
import subprocess
import sys
from pathlib import Path

import pytest


def run(*args: str, env: dict | None = None) -> subprocess.CompletedProcess:
    full_env = dict(os.environ)
    full_env.pop("TRACKER_STORE", None)
    full_env.update(env or {})
    return subprocess.run(
        [sys.executable, "-m", "tracker", *args], capture_output=True, text=True, env=full_env, timeout=300
    )


def digest(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def test_status_creates_the_demo_store_and_reports_it(tmp_path):
    store = tmp_path / "x" / "store.duckdb"
    res = run("--store", str(store), "status")
    assert res.returncode == 0, res.stderr
    assert store.exists() and (store.parent / "tracker.toml").exists() and (store.parent / "inbox").is_dir()
    out = res.stdout
    assert "factors:      10" in out
    assert "date range:   2001-01-02 .. 2026-11-02" in out  # the scenario's loaded span
    assert "factor_returns" in out and "asset_returns" in out
    assert "invented" in out and "not investment advice" in out


def test_environment_variable_selects_the_store(tmp_path):
    store = tmp_path / "env" / "store.duckdb"
    res = run("status", env={"TRACKER_STORE": str(store)})
    assert res.returncode == 0, res.stderr
    assert str(store) in res.stdout


def test_unknown_option_fails_cleanly(tmp_path):
    res = run("--store", str(tmp_path / "s.duckdb"), "status", "--bogus")
    assert res.returncode == 2
    assert not (tmp_path / "s.duckdb").exists()


def test_corrupt_store_gives_one_line_and_is_untouched(tmp_path):
    store = tmp_path / "store.duckdb"
    store.write_bytes(b"this is not a database" * 100)
    before = digest(store)
    res = run("--store", str(store), "status")
    assert res.returncode == 2
    lines = [ln for ln in res.stderr.splitlines() if ln.strip()]
    assert len(lines) == 1 and lines[0].startswith("tracker: error:")
    assert digest(store) == before


@pytest.mark.skipif(os.geteuid() == 0, reason="root can write anywhere; covered by the path-is-a-file case")
def test_unwritable_folder(tmp_path):
    locked = tmp_path / "locked"
    locked.mkdir(mode=0o500)
    res = run("--store", str(locked / "sub" / "store.duckdb"), "status")
    assert res.returncode == 2 and "tracker: error:" in res.stderr


def test_store_under_a_file_is_refused_and_nothing_written(tmp_path):
    blocker = tmp_path / "blocker"
    blocker.write_text("a plain file where a folder should be")
    res = run("--store", str(blocker / "store.duckdb"), "status")
    assert res.returncode == 2
    assert res.stderr.count("\n") == 1 and "cannot create store folder" in res.stderr
    assert blocker.read_text() == "a plain file where a folder should be"


def test_bad_toml_value_writes_nothing(tmp_path):
    folder = tmp_path / "cfg"
    folder.mkdir()
    (folder / "tracker.toml").write_text("[models]\nregimes = 7\n")
    res = run("--store", str(folder / "store.duckdb"), "status")
    assert res.returncode == 2 and "[models] regimes" in res.stderr
    assert sorted(p.name for p in folder.iterdir()) == ["tracker.toml"]


def test_export_csv_and_parquet(tmp_path):
    store = tmp_path / "e" / "store.duckdb"
    assert run("--store", str(store), "init").returncode == 0
    out = tmp_path / "out"
    res = run("--store", str(store), "export", "factors", "factor_returns", "--out", str(out))
    assert res.returncode == 0, res.stderr
    import pandas as pd

    f = pd.read_csv(out / "factors.csv")
    assert len(f) == 10 and "is_new" in f.columns
    res = run("--store", str(store), "export", "factor_returns", "--format", "parquet", "--out", str(out))
    assert res.returncode == 0, res.stderr
    assert len(pd.read_parquet(out / "factor_returns.parquet")) == len(pd.read_csv(out / "factor_returns.csv"))
    bad = run("--store", str(store), "export", "no_such_table", "--out", str(out))
    assert bad.returncode == 2 and "unknown table" in bad.stderr


def test_init_empty_then_refuses_to_overwrite(tmp_path):
    store = tmp_path / "mine" / "store.duckdb"
    res = run("--store", str(store), "init", "--empty")
    assert res.returncode == 0 and "empty" in res.stdout
    again = run("--store", str(store), "init")
    assert again.returncode == 2 and "already exists" in again.stderr
