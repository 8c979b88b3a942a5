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
