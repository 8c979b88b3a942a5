"""Connection discipline: two real processes share one store file through short connections."""

from __future__ import annotations

import subprocess
import sys
import textwrap
import time

import pytest

from tracker.store.connection import Store
from tracker.store.errors import StoreBusy

HOLDER = textwrap.dedent(
    """
    import sys, time
    from pathlib import Path
    from tracker.store.connection import Store
    store = Store(Path(sys.argv[1]))
    with store.connect() as con:
        con.execute("INSERT OR REPLACE INTO store_meta VALUES ('holder', 'yes')")
        print("holding", flush=True)
        time.sleep(float(sys.argv[2]))
    """
)


def _start_holder(path, seconds):
    proc = subprocess.Popen([sys.executable, "-c", HOLDER, str(path), str(seconds)], stdout=subprocess.PIPE, text=True)
    assert proc.stdout.readline().strip() == "holding"
    return proc


def test_second_process_waits_then_proceeds(empty_store):
    store, _ = empty_store
    proc = _start_holder(store.path, 1.0)
    t0 = time.monotonic()
    with Store(store.path, busy_timeout=30).connect() as con:
        waited = time.monotonic() - t0
        assert con.execute("SELECT value FROM store_meta WHERE key = 'holder'").fetchone() == ("yes",)
    proc.wait(timeout=30)
    assert waited > 0.3  # it really had to wait for the other process


def test_busy_store_gives_a_clear_error(empty_store):
    store, _ = empty_store
    proc = _start_holder(store.path, 3.0)
    try:
        with pytest.raises(StoreBusy, match="held by another process"):
            with Store(store.path, busy_timeout=0.3).connect():
                pass
    finally:
        proc.wait(timeout=30)


# ------------------------------------------------------------------ holding the store

READER = textwrap.dedent(
    """
    import sys
    from pathlib import Path
    from tracker.store.connection import Store
    from tracker.store.errors import StoreBusy
    try:
        with Store(Path(sys.argv[1]), busy_timeout=float(sys.argv[2])).connect() as con:
            print(con.execute("SELECT value FROM store_meta WHERE key = 'held'").fetchone()[0])
    except StoreBusy:
        print("busy")
    """
)


def _read_from_another_process(path, busy_timeout: float) -> str:
    out = subprocess.run([sys.executable, "-c", READER, str(path), str(busy_timeout)], capture_output=True,
                         text=True, timeout=60, check=True)
    return out.stdout.strip()


def test_a_hold_opens_the_store_once_and_its_units_share_it(empty_store, monkeypatch):
    store, _ = empty_store
    opens = []
    original = Store._open_with_retry

    def counting(self):
        opens.append(1)
        return original(self)

    monkeypatch.setattr(Store, "_open_with_retry", counting)
    with store.hold():
        with store.transaction() as con:
            con.execute("INSERT OR REPLACE INTO store_meta VALUES ('held', 'one')")
        with store.hold():                                  # re-entrant
            with store.connect() as con:
                assert con.execute("SELECT value FROM store_meta WHERE key = 'held'").fetchone() == ("one",)
        with pytest.raises(RuntimeError):                   # a failed unit still rolls back
            with store.transaction() as con:
                con.execute("INSERT OR REPLACE INTO store_meta VALUES ('held', 'two')")
                raise RuntimeError("boom")
        assert store.is_held
    assert len(opens) == 1 and not store.is_held
    with store.connect() as con:                            # outside: its own connection again
        assert con.execute("SELECT value FROM store_meta WHERE key = 'held'").fetchone() == ("one",)
    assert len(opens) == 2
    # closed with the hold: another process gets the file at once
    assert _read_from_another_process(store.path, 0.5) == "one"


def test_another_process_waits_for_a_hold_and_gets_the_store_after_let_go(empty_store):
    store, _ = empty_store
    with store.transaction() as con:
        con.execute("INSERT OR REPLACE INTO store_meta VALUES ('held', 'yes')")
    with store.hold():
        assert _read_from_another_process(store.path, 0.3) == "busy"   # held: the file is taken
        store.let_go()                                                  # as update() does before fits
        assert not store.is_held
        assert _read_from_another_process(store.path, 5.0) == "yes"
        with store.connect() as con:                                    # later units open their own
            assert con.execute("SELECT count(*) FROM store_meta").fetchone()[0] >= 1


def test_another_thread_shares_a_hold(empty_store):
    import threading

    store, _ = empty_store
    seen = []
    with store.hold():
        with store.transaction() as con:
            con.execute("INSERT OR REPLACE INTO store_meta VALUES ('held', 'thread')")

        def read():
            with store.connect() as con:
                seen.append(con.execute("SELECT value FROM store_meta WHERE key = 'held'").fetchone()[0])

        t = threading.Thread(target=read)
        t.start()
        t.join(timeout=30)
    assert seen == ["thread"]


def test_an_old_hold_lets_go_at_its_next_unit(empty_store, monkeypatch):
    import tracker.store.connection as connection

    store, _ = empty_store
    with store.transaction() as con:
        con.execute("INSERT OR REPLACE INTO store_meta VALUES ('held', 'old')")
    monkeypatch.setattr(connection, "HOLD_LIMIT_S", 0.0)
    with store.hold():
        assert store.is_held
        with store.connect() as con:                 # past the limit: this unit opens its own
            assert not store.is_held
            assert con.execute("SELECT value FROM store_meta WHERE key = 'held'").fetchone() == ("old",)
        assert _read_from_another_process(store.path, 5.0) == "old"
        with store.hold():                           # a nested hold opens afresh ...
            assert store.is_held
        assert not store.is_held                     # ... and closes what it opened
