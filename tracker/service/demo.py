"""`tracker demo`: replay the scenario's held-back trading days into the store's inbox.

Each day becomes one drop file, written under a hidden temporary name and renamed into
the inbox (the documented convention), so the watcher never reads a half-written file.
"""

from __future__ import annotations

import threading
from collections.abc import Callable
from pathlib import Path

from tracker.config import Config
from tracker.store.connection import Store
from tracker.store.sqlfiles import sql


def demo_drop_name(day) -> str:
    return f"demo-{day.strftime('%Y-%m-%d')}.sql"


class DemoReplay:
    """Writes the held-back days not yet in the store into the inbox, one every ``pace`` s."""

    def __init__(self, store: Store, config: Config, *, pace: float) -> None:
        self.store = store
        self.inbox = config.inbox_path(store.folder)
        self.pace = pace
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None

    def pending_days(self) -> list:
        from tracker.seed_db.scenario import generate, held_back_days

        with self.store.connect() as con:
            last = con.execute(sql("status.date_range")).fetchone()[1]
        self._scenario = generate()
        days = held_back_days(self._scenario)
        folder = self.inbox
        seen = {p.name for sub in ("", "applied", "rejected", "processing")
                for p in ((folder / sub).iterdir() if (folder / sub).is_dir() else [])}
        # claims in processing/ carry a suffix after the name: match on the prefix
        return [d for d in days if (last is None or d.date() > last)
                and not any(n.startswith(demo_drop_name(d)) for n in seen)]

    def drop_one(self, day) -> Path:
        from tracker.seed_db.scenario import drop_file_text

        target = self.inbox / demo_drop_name(day)
        tmp = self.inbox / f".{target.name}.tmp"
        tmp.write_text(drop_file_text(self._scenario, day), "utf-8")
        tmp.replace(target)
        return target

    def run_blocking(self, echo: Callable[[str], None] | None = None) -> None:
        if self.pace <= 0:
            return
        for day in self.pending_days():
            if self._stop.wait(self.pace):
                return
            path = self.drop_one(day)
            if echo:
                echo(f"dropped {path}")

    def start(self) -> None:
        if self.pace <= 0:
            return
        self._thread = threading.Thread(target=self.run_blocking, name="demo-replay", daemon=True)
        self._thread.start()

    def stop(self) -> None:
        self._stop.set()
