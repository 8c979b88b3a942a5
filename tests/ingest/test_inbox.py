"""The inbox: which files are picked up, claims, crash recovery states, the two commands."""

from __future__ import annotations

import dataclasses
import json
import os
import subprocess
import sys
import threading
from pathlib import Path

import pytest
from ingest_helpers import TODAY, data_checksum, drop, fetch, inbox_of

from tracker.ingest import ingest_command, process_inbox, watch_command
from tracker.ingest.apply import DropMeta, ingest_bytes, sha256_of
from tracker.ingest.inbox import claim, owner_alive, parse_claim, pending_files

GOOD = "INSERT INTO factor_returns VALUES ('MKT', DATE '2026-11-03', 0.01), ('VAL', DATE '2026-11-03', 0.002);\n"


def dead_pid() -> int:
    """The pid of a process that has exited and been reaped."""
    p = subprocess.Popen([sys.executable, "-c", "pass"])
    p.wait()
    return p.pid


def fake_claim(inbox: Path, name: str, text: str, pid: int, token: str = "0123456789abcdef") -> Path:
    (inbox / "processing").mkdir(exist_ok=True)
    path = inbox / "processing" / f"{name}.{pid}.{token}"
    path.write_text(text)
    return path


def test_only_finished_sql_files_are_picked_up(store):
    inbox = inbox_of(store)
    for name in (".hidden.sql", "half.sql.tmp", "half.sql.part", "notes.txt", "data.SQL.bak", "ok.sql"):
        (inbox / name).write_text(GOOD)
    (inbox / "dir.sql").mkdir()
    assert [p.name for p in pending_files(inbox)] == ["ok.sql"]
    st, cfg = store
    outs = process_inbox(st, cfg, today=TODAY)
    assert [o.file_name for o in outs] == ["ok.sql"]
    left = sorted(p.name for p in inbox.iterdir())
    assert left == sorted([".hidden.sql", "half.sql.tmp", "half.sql.part", "notes.txt", "data.SQL.bak", "dir.sql",
                           "applied", "rejected", "processing"])


def test_files_are_taken_oldest_first(store):
    inbox = inbox_of(store)
    drop(inbox, "b.sql", GOOD, mtime_ns=2_000_000_000_000_000_000)
    drop(inbox, "a.sql", GOOD.replace("0.01", "0.02"), mtime_ns=2_000_000_000_000_000_001)
    st, cfg = store
    outs = process_inbox(st, cfg, today=TODAY)
    assert [o.file_name for o in outs] == ["b.sql", "a.sql"]
    assert outs[1].n_revisions == 1   # the later file revises the earlier one


def test_a_claim_is_won_by_exactly_one_renamer(tmp_path):
    (tmp_path / "processing").mkdir()
    f = tmp_path / "x.sql"
    f.write_text(GOOD)
    first = claim(f, tmp_path / "processing")
    second = claim(f, tmp_path / "processing")
    assert first is not None and second is None
    name, pid, token = parse_claim(first[0].name)
    assert (name, pid, token) == ("x.sql", os.getpid(), first[1])


def test_owner_alive():
    me = subprocess.Popen([sys.executable, "-c", "import time; time.sleep(30)"])
    try:
        claimed = Path(__file__)  # any existing file older than the sleeper
        assert owner_alive(me.pid, "0" * 16, claimed) is False  # started after the "claim"
    finally:
        me.kill()
        me.wait()
    assert owner_alive(dead_pid(), "0" * 16, Path(__file__)) is False


def test_recovery_reprocesses_an_unrecorded_claim_of_a_dead_process(store):
    st, cfg = store
    inbox = inbox_of(store)
    fake_claim(inbox, "lost.sql", GOOD, dead_pid())
    [o] = process_inbox(st, cfg, today=TODAY)
    assert (o.file_name, o.outcome, o.recovered) == ("lost.sql", "applied", False)
    assert (inbox / "applied" / "lost.sql").exists()
    assert list((inbox / "processing").iterdir()) == []


def test_recovery_only_finishes_the_move_of_a_recorded_claim(store):
    st, cfg = store
    inbox = inbox_of(store)
    token = "fedcba9876543210"
    data = GOOD.encode()
    # The dead process committed the outcome, then died before moving the file.
    committed = ingest_bytes(st, cfg, data, DropMeta("done.sql", token, len(data), sha256_of(data),
                                                     __import__("datetime").datetime.now()), today=TODAY)
    fake_claim(inbox, "done.sql", GOOD, dead_pid(), token)
    before = data_checksum(st)
    [o] = process_inbox(st, cfg, today=TODAY)
    assert (o.outcome, o.recovered, o.drop_id) == ("applied", True, committed.drop_id)
    assert data_checksum(st) == before
    assert fetch(st, "SELECT count(*) FROM drop_files") == [(1,)]
    receipt = json.loads((inbox / "applied" / "done.sql.receipt.json").read_text())
    assert receipt["recovered"] is True and receipt["drop_id"] == committed.drop_id
    assert receipt["rows_written"]["factor_returns"] == 2


def test_recovery_after_the_link_but_before_the_unlink(store):
    st, cfg = store
    inbox = inbox_of(store)
    token = "00000000000000aa"
    data = GOOD.encode()
    committed = ingest_bytes(st, cfg, data, DropMeta("half.sql", token, len(data), sha256_of(data),
                                                     __import__("datetime").datetime.now()), today=TODAY)
    claimed = fake_claim(inbox, "half.sql", GOOD, dead_pid(), token)
    (inbox / "applied").mkdir(exist_ok=True)
    os.link(claimed, inbox / "applied" / "half.sql")       # the move had begun
    [o] = process_inbox(st, cfg, today=TODAY)
    assert o.drop_id == committed.drop_id and o.stored_as == inbox / "applied" / "half.sql"
    assert sorted(p.name for p in (inbox / "applied").iterdir()) == ["half.sql", "half.sql.receipt.json"]
    assert list((inbox / "processing").iterdir()) == []


def test_a_live_owners_claim_is_left_alone(store):
    st, cfg = store
    inbox = inbox_of(store)
    sleeper = subprocess.Popen([sys.executable, "-c", "import time; time.sleep(30)"])
    try:
        import time

        time.sleep(0.2)
        claimed = fake_claim(inbox, "busy.sql", GOOD, sleeper.pid)
        assert process_inbox(st, cfg, today=TODAY) == []
        assert claimed.exists()
    finally:
        sleeper.kill()
        sleeper.wait()
    [o] = process_inbox(st, cfg, today=TODAY)
    assert o.file_name == "busy.sql" and o.outcome == "applied"


def test_oversize_files_are_rejected_unread(store, tmp_path):
    st, cfg = store
    cfg = dataclasses.replace(cfg, ingest=dataclasses.replace(cfg.ingest, max_file_mb=1.0))
    inbox = inbox_of(store)
    before = data_checksum(st)
    # 50 MB of otherwise valid rows: over the lowered limit (1 MiB)
    row = "('MKT', DATE '2026-11-03', 0.0100000000),\n"
    body = "INSERT INTO factor_returns VALUES\n" + row * (50_000_000 // len(row)) + "('VAL', DATE '2026-11-03', 0.01);\n"
    drop(inbox, "huge.sql", body)
    size = (inbox / "huge.sql").stat().st_size
    assert size >= 50_000_000
    [o] = process_inbox(st, cfg, today=TODAY)
    assert (o.outcome, o.rule, o.sha256, o.size_bytes) == ("rejected", "file_too_large", "", size)
    assert "max_file_mb = 1" in o.reason and "not read" in o.reason
    assert data_checksum(st) == before
    assert (inbox / "rejected" / "huge.sql").stat().st_size == size


def test_ingest_command_with_paths(store, tmp_path):
    st, cfg = store
    outside = tmp_path / "elsewhere"
    outside.mkdir()
    (outside / "good.sql").write_text(GOOD)
    (outside / "bad.sql").write_text("DROP TABLE factors;")
    lines = []
    code = ingest_command(st, cfg, [outside / "good.sql"], lines.append)
    assert code == 0 and lines[0].startswith("applied good.sql")
    assert (outside / "good.sql").read_text() == GOOD          # the original is left alone
    assert (inbox_of(store) / "applied" / "good.sql").exists()
    lines.clear()
    code = ingest_command(st, cfg, [outside], lines.append)     # a folder: its *.sql files
    assert code == 1
    assert any(x.startswith("rejected bad.sql") for x in lines)
    assert any(x.startswith("duplicate good.sql") for x in lines)
    assert lines[-1] == "0 applied, 1 duplicate, 1 rejected"
    lines.clear()
    assert ingest_command(st, cfg, [tmp_path / "missing.sql"], lines.append) == 1
    assert "no such file" in lines[0]


def test_ingest_command_on_the_inbox(store):
    st, cfg = store
    drop(inbox_of(store), "a.sql", GOOD)
    lines = []
    assert ingest_command(st, cfg, None, lines.append) == 0
    assert lines[0].startswith("applied a.sql") and lines[-1] == "1 applied, 0 duplicate, 0 rejected"
    assert ingest_command(st, cfg, None, lines.append) == 0   # nothing waiting: still fine


def test_watch_command_processes_until_stopped(store):
    st, cfg = store
    cfg = dataclasses.replace(cfg, ingest=dataclasses.replace(cfg.ingest, poll_s=0.05))
    stop = threading.Event()
    lines, applied = [], []
    seen = threading.Event()

    def on_applied(o):
        applied.append(o.file_name)
        seen.set()

    t = threading.Thread(target=lambda: lines.append(watch_command(st, cfg, lines.append, stop, on_applied)))
    t.start()
    try:
        drop(inbox_of(store), "w.sql", GOOD)
        assert seen.wait(20)
    finally:
        stop.set()
        t.join(20)
    assert not t.is_alive()
    assert applied == ["w.sql"] and lines[-1] == 0
    assert lines[0].startswith("watching ")


def test_an_internal_error_is_recorded_not_retried_for_ever(store, monkeypatch):
    st, cfg = store

    def broken(*a, **k):
        raise ValueError("simulated bug")

    monkeypatch.setattr("tracker.ingest.apply.check_returns", broken)
    before = data_checksum(st)
    drop(inbox_of(store), "a.sql", GOOD)
    [o] = process_inbox(st, cfg, today=TODAY)
    assert (o.outcome, o.rule) == ("rejected", "internal_error") and "simulated bug" in o.reason
    assert data_checksum(st) == before
    assert (inbox_of(store) / "rejected" / "a.sql").exists()


def test_a_busy_store_leaves_the_file_for_the_next_pass(store, monkeypatch):
    from tracker.store.errors import StoreBusy

    st, cfg = store

    def busy(*a, **k):
        raise StoreBusy("held by another process")

    drop(inbox_of(store), "a.sql", GOOD)
    monkeypatch.setattr("tracker.ingest.inbox.ingest_bytes", busy)
    with pytest.raises(StoreBusy):
        process_inbox(st, cfg, today=TODAY)
    monkeypatch.undo()
    [o] = process_inbox(st, cfg, today=TODAY)     # recovered from processing/ by this same process
    assert (o.file_name, o.outcome) == ("a.sql", "applied")
    assert fetch(st, "SELECT count(*) FROM drop_files") == [(1,)]


def test_ingest_does_not_import_the_ui_or_estimation():
    import ast

    import tracker.ingest as pkg

    offenders = {}
    for p in Path(pkg.__file__).parent.glob("*.py"):
        tree = ast.parse(p.read_text())
        mods = {a.name for n in ast.walk(tree) if isinstance(n, ast.Import) for a in n.names}
        mods |= {n.module for n in ast.walk(tree) if isinstance(n, ast.ImportFrom) and n.module}
        bad = sorted(m for m in mods if m.startswith(("textual", "tracker.ui", "tracker.estimation",
                                                      "tracker.service")))
        if bad:
            offenders[p.name] = bad
    assert offenders == {}
