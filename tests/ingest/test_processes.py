"""Real processes: two watchers on one inbox, and ingestion killed with SIGKILL at random.

Both tests compare the final store with the expected contents, computed by processing
the same files in this process without interference.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from collections import Counter
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from ingest_helpers import TODAY, drop, fetch, seed_history

from tracker.ingest import process_inbox
from tracker.store.bootstrap import open_store

WORKER = r"""
import sys, time
from datetime import date
from pathlib import Path
from tracker.store.bootstrap import open_store
from tracker.ingest import process_inbox
store, config = open_store(Path(sys.argv[1]), create_demo=False)
go = Path(sys.argv[2]) if len(sys.argv) > 2 else None
print("ready", flush=True)
while go is not None and not go.exists():
    time.sleep(0.005)
inbox = config.inbox_path(store.folder)
done = 0
while True:
    done += len(process_inbox(store, config, today=date(2026, 12, 1)))
    if not any(inbox.glob("*.sql")) and not any((inbox / "processing").iterdir()):
        break
    time.sleep(0.01)
print("done", done, flush=True)
"""


def make_store(folder: Path):
    st, cfg = open_store(folder / "store.duckdb", create_demo=False)
    with st.connect() as con:
        seed_history(con, n_days=30)
    return st, cfg


def drop_files(rng: np.random.Generator, n: int, rows: int, *, revisions: bool) -> list[tuple[str, str]]:
    """n files of factor and asset returns on distinct dates; some copies, some bad files."""
    per = 20
    days = pd.bdate_range("2020-02-03", periods=n * per)
    assert days[-1].date() < TODAY
    out = []
    for k in range(n):
        ds = days[k * per:(k + 1) * per]
        ids = [f"S{j:03d}" for j in range(max(1, rows // per))]
        decl = "INSERT INTO assets (asset_id, label, frequency) VALUES\n" + ",\n".join(
            f"('{i}', 'Sleeve {i}', 'daily')" for i in ids) + ";\n"
        vals = rng.normal(0, 0.01, (len(ids), len(ds)))
        body = "INSERT INTO asset_returns VALUES\n" + ",\n".join(
            f"('{i}', DATE '{d:%Y-%m-%d}', {float(vals[a, b])!r})"
            for a, i in enumerate(ids) for b, d in enumerate(ds)) + ";\n"
        fac = "INSERT INTO factor_returns VALUES " + ", ".join(
            f"('MKT', DATE '{d:%Y-%m-%d}', {float(rng.normal(0, 0.01))!r})" for d in ds[:5]) + ";\n"
        if revisions and k > 0 and k % 3 == 0:
            prev = days[(k - 1) * per]
            fac += f"INSERT INTO factor_returns VALUES ('MKT', DATE '{prev:%Y-%m-%d}', {float(rng.normal(0, 0.01))!r});\n"
        out.append((f"f{k:03d}.sql", decl + body + fac))
        if k % 5 == 2:
            out.append((f"f{k:03d}-copy.sql", decl + body + fac))
        if k % 7 == 3:
            out.append((f"f{k:03d}-bad.sql", fac + "DELETE FROM asset_returns;\n"))
    return out


def place(inbox: Path, files) -> None:
    for k, (name, text) in enumerate(files):
        drop(inbox, name, text, mtime_ns=1_900_000_000_000_000_000 + k * 1_000_000)


def contents(st) -> dict:
    q = {
        "factors": "SELECT factor_id, label, description, frequency, is_traded, is_new, start_date FROM factors",
        "assets": "SELECT asset_id, label, description, frequency, start_date FROM assets",
        "factor_returns": "SELECT factor_id, date, ret FROM factor_returns",
        "asset_returns": "SELECT asset_id, date, ret FROM asset_returns",
        "risk_free": "SELECT frequency, date, rate FROM risk_free",
        "revisions": "SELECT series_kind, series_id, date, old_value, new_value FROM revisions",
        "drops": "SELECT file_name, outcome FROM drop_files",
    }
    return {k: Counter(fetch(st, v)) for k, v in q.items()}


def folder_state(inbox: Path) -> dict:
    return {sub: sorted(p.name for p in (inbox / sub).iterdir() if not p.name.startswith("."))
            for sub in ("applied", "rejected", "processing")} | {
        "inbox": sorted(p.name for p in inbox.iterdir() if p.is_file())}


def expected(tmp_path: Path, files) -> tuple[dict, dict]:
    st, cfg = make_store(tmp_path / "reference")
    inbox = cfg.inbox_path(st.folder)
    place(inbox, files)
    outs = process_inbox(st, cfg, today=TODAY)
    assert len(outs) == len(files)
    return contents(st), folder_state(inbox)


def start_worker(store_path: Path, go: Path | None = None) -> subprocess.Popen:
    args = [sys.executable, "-c", WORKER, str(store_path)] + ([str(go)] if go else [])
    p = subprocess.Popen(args, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    assert p.stdout.readline().strip() == "ready", p.stderr.read()
    return p


def test_two_processes_on_one_inbox_never_apply_a_file_twice(tmp_path):
    rng = np.random.default_rng(11)
    files = drop_files(rng, 16, 400, revisions=False)
    want, want_folders = expected(tmp_path, files)
    st, cfg = make_store(tmp_path / "shared")
    inbox = cfg.inbox_path(st.folder)
    place(inbox, files)
    go = tmp_path / "go"
    workers = [start_worker(st.path, go) for _ in range(2)]
    go.touch()
    results = []
    for w in workers:
        out, err = w.communicate(timeout=300)
        assert w.returncode == 0, err
        results.append(int(out.split()[-1]))
    got = contents(st)
    # Which of two identical files counts as the duplicate depends on who came first.
    assert {k: v for k, v in got.items() if k != "drops"} == {k: v for k, v in want.items() if k != "drops"}
    drops = dict(fetch(st, "SELECT file_name, outcome FROM drop_files"))
    assert len(drops) == len(files) == sum(got["drops"].values())   # one outcome per file
    by_text: dict[str, list[str]] = {}
    for name, text in files:
        by_text.setdefault(text, []).append(drops[name])
    for outcomes in by_text.values():
        if "rejected" not in outcomes:
            assert sorted(outcomes) == ["applied"] + ["duplicate"] * (len(outcomes) - 1)
    assert sum(results) == len(files)
    assert min(results) >= 1, results  # both really took part
    assert folder_state(inbox) == want_folders


@pytest.mark.slow
def test_sigkill_at_random_points_leaves_the_store_consistent(tmp_path):
    rng = np.random.default_rng(20261201)
    files = drop_files(rng, 56, 1200, revisions=True)
    want, want_folders = expected(tmp_path, files)
    st, cfg = make_store(tmp_path / "crashing")
    inbox = cfg.inbox_path(st.folder)
    place(inbox, files)
    kills = mid_file = 0
    for attempt in range(60):
        p = start_worker(st.path)
        time.sleep(float(rng.uniform(0.0, 0.5)))
        if p.poll() is None:
            os.kill(p.pid, signal.SIGKILL)
            kills += 1
        p.wait()
        p.stdout.close()
        p.stderr.close()
        mid_file += any(not q.name.startswith(".") for q in (inbox / "processing").iterdir())
        # After every kill the store opens and holds no half-applied file:
        # each file's rows are in the store exactly when its outcome is recorded.
        recorded = {f for f, o in fetch(st, "SELECT file_name, outcome FROM drop_files WHERE outcome = 'applied'")}
        for name, text in files:
            if name.endswith("-bad.sql") or name.endswith("-copy.sql"):
                continue
            first_asset_date = text.split("DATE '")[1][:10]
            n = fetch(st, "SELECT count(*) FROM asset_returns WHERE date = ?", [first_asset_date])[0][0]
            assert (n > 0) == (name in recorded), (name, n)
        if kills >= 22 or not any(inbox.glob("*.sql")):
            break
    assert kills >= 20
    assert mid_file >= 5, mid_file  # kills really landed while a file was claimed
    print(f"{kills} kills, {mid_file} with a file in processing/")
    final = start_worker(st.path)
    final.communicate(timeout=300)
    assert final.returncode == 0
    assert contents(st) == want
    assert folder_state(inbox) == want_folders
    for name in want_folders["applied"] + want_folders["rejected"]:
        if not name.endswith(".receipt.json"):
            sub = "applied" if name in want_folders["applied"] else "rejected"
            assert (inbox / sub / (name + ".receipt.json")).exists()
