"""The real terminal: `python -m tracker --store <copy> ui` in detached tmux sessions at 80x24.

Opens a factor's detail and goes back, drops a file into the inbox and waits for the
row to change on screen, with a second instance on the same store watching too; then
quits one with `q` and ends the other with SIGTERM, and both report exit code 0.
"""

from __future__ import annotations

import os
import re
import shutil
import subprocess
import sys
import time

import pytest
from ui_helpers import N_STORED, day, drop_text, write_drop

TMUX = shutil.which("tmux") or ("/usr/bin/tmux" if os.path.exists("/usr/bin/tmux") else None)
pytestmark = pytest.mark.skipif(TMUX is None, reason="tmux is not installed; the terminal session test needs it")


class Session:
    def __init__(self, socket: str, name: str, store_path, width: int = 80, height: int = 24) -> None:
        self.socket, self.name = socket, name
        cmd = (f"{sys.executable} -m tracker --store {store_path} ui; echo TRACKER-EXIT=$?; sleep 120")
        self.tmux("new-session", "-d", "-s", name, "-x", str(width), "-y", str(height), cmd)

    def tmux(self, *args: str) -> str:
        return subprocess.run([TMUX, "-L", self.socket, *args], check=True, capture_output=True, text=True,
                              env={**os.environ, "TERM": "xterm-256color"}).stdout

    def screen(self) -> str:
        return self.tmux("capture-pane", "-p", "-t", self.name)

    def keys(self, *keys: str) -> None:
        for k in keys:
            self.tmux("send-keys", "-t", self.name, k)
            time.sleep(0.15)

    def wait_for(self, predicate, timeout: float = 40.0) -> str:
        deadline = time.monotonic() + timeout
        while True:
            text = self.screen()
            if predicate(text):
                return text
            if time.monotonic() > deadline:
                raise AssertionError(f"screen of {self.name} never matched; last screen:\n{text}")
            time.sleep(0.2)

    def pid(self) -> int:
        shell = int(self.tmux("display-message", "-p", "-t", self.name, "#{pane_pid}").strip())
        out = subprocess.run(["pgrep", "-P", str(shell), "-f", "tracker"], capture_output=True, text=True).stdout
        return int(out.split()[0])


def _row(text: str, factor: str) -> str:
    """The board row of ``factor`` (padding, an optional change mark, the id, then its date)."""
    pattern = re.compile(rf"^\s*[*+]?{re.escape(factor)}\s+\d{{4}}-\d\d-\d\d")
    return next((line for line in text.splitlines() if pattern.match(line)), "")


def test_two_instances_in_tmux_follow_a_dropped_file(small_store_template, tmp_path):
    pytest.importorskip("tracker.ingest.inbox", reason="the ingest layer is not installed")
    folder = tmp_path / "store"
    shutil.copytree(small_store_template.parent, folder)
    store_path = folder / "store.duckdb"
    socket = f"tracker-test-{os.getpid()}"
    first = second = None
    try:
        first = Session(socket, "first", store_path)
        board = first.wait_for(lambda t: "ALPHA" in t and "GAMMA" in t and "live" in t)
        assert "Market regime" in board and "not investment advice" in board
        lines = board.splitlines()
        assert len(lines) <= 24 and all(len(line) <= 80 for line in lines)
        second = Session(socket, "second", store_path)
        second.wait_for(lambda t: "GAMMA" in t and "live" in t)

        first.keys("Down")
        first.wait_for(lambda t: any(line.startswith(" BETA ") for line in t.splitlines()[-6:]))
        first.keys("Enter")
        first.wait_for(lambda t: "BETA Beta sleeve · window 3y" in t and "Premium per year" in t)
        first.keys("Escape")
        first.wait_for(lambda t: "Market regime" in t and "BETA" in t)

        old = _row(first.screen(), "GAMMA")
        assert day(N_STORED).isoformat() in old
        inbox = folder / "inbox"
        write_drop(inbox, "tmux-next-day.sql", drop_text(N_STORED + 1))
        new_date = day(N_STORED + 1).isoformat()
        for s in (first, second):
            text = s.wait_for(lambda t: new_date in _row(t, "GAMMA") and new_date in _row(t, "ALPHA"))
            assert _row(text, "GAMMA") != old
        # the cursor stayed on BETA: its summary is still the one under the table
        assert any(line.startswith(" BETA Beta sleeve") for line in first.screen().splitlines())
        assert (inbox / "applied" / "tmux-next-day.sql").exists()

        first.keys("q")
        first.wait_for(lambda t: "TRACKER-EXIT=0" in t, timeout=15)
        os.kill(second.pid(), 15)
        second.wait_for(lambda t: "TRACKER-EXIT=0" in t, timeout=15)
    finally:
        subprocess.run([TMUX, "-L", socket, "kill-server"], capture_output=True)
