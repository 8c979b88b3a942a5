"""Opening the DuckDB store: short connections, retried while another process holds it.

DuckDB lets one process open a file read-write, or many processes read-only, never both.
The UI, a headless watcher and one-off commands must share one file, so every piece of
work here opens the store, does one short unit of work and closes it again. Estimation
runs between connections, never while one is open. When another process holds the file,
opening is retried with back-off for ``busy_timeout`` seconds and then fails with one
clear line (:class:`StoreBusy`). Inside one process a lock serialises access, so worker
threads never hold two connections to the file at once.

A short run of such units -- the daily cycle of applying a drop and advancing the
estimates, about a second -- may *hold* the store (:meth:`Store.hold`): one connection
stays open for the whole run and every unit inside it takes a cursor on it, so the file
is opened and checkpointed once instead of once a unit (each open of a large store costs
~0.02 s). Other processes wait at most ``busy_timeout`` seconds for the file, so nothing
holds it for long: a run with fits to do lets go first (:meth:`Store.let_go`), and a
hold older than HOLD_LIMIT_S seconds lets go at its next unit of work.
"""

from __future__ import annotations

import os
import random
import threading
import time
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

import duckdb

from tracker.store.errors import StoreBusy, StoreError
from tracker.store.sqlfiles import migrations, sql

# longest a hold keeps the store before the next unit lets go (a day's drop and update
# take about a second)
HOLD_LIMIT_S = 3.0
_LOCK_MARKERS = ("could not set lock", "conflicting lock", "lock on file")
_process_locks: dict[str, threading.RLock] = {}
_process_locks_guard = threading.Lock()


def _lock_for(path: Path) -> threading.RLock:
    key = str(path.resolve())
    with _process_locks_guard:
        return _process_locks.setdefault(key, threading.RLock())


def _is_lock_conflict(exc: Exception) -> bool:
    text = str(exc).lower()
    return any(marker in text for marker in _LOCK_MARKERS)


class Store:
    """A DuckDB store file and how to open it.

    Parameters
    ----------
    path : Path
        The ``.duckdb`` file. Its folder holds the inbox and the configuration file.
    busy_timeout : float
        Seconds to keep retrying while another process holds the file.
    memory_limit_mb : int
        DuckDB's ``memory_limit`` for each connection (``[store] memory_limit_mb``).
    """

    def __init__(self, path: Path, *, busy_timeout: float = 30.0, memory_limit_mb: int = 1024) -> None:
        self.path = Path(path)
        self.busy_timeout = float(busy_timeout)
        self.memory_limit_mb = int(memory_limit_mb)
        self._lock = _lock_for(self.path)
        self._held: duckdb.DuckDBPyConnection | None = None
        self._held_since = 0.0
        self._units = 0                 # units of work open now (nested in this thread)

    @property
    def folder(self) -> Path:
        return self.path.parent

    def exists(self) -> bool:
        return self.path.exists()

    @contextmanager
    def connect(self) -> Iterator[duckdb.DuckDBPyConnection]:
        """Open the store for one short unit of work and close it afterwards.

        Inside :meth:`hold` the unit gets a cursor on the held connection instead.
        """
        with self._lock:
            if self._held is not None and self._units == 0 and time.monotonic() - self._held_since > HOLD_LIMIT_S:
                self.let_go()
            con = self._held.cursor() if self._held is not None else self._open_with_retry()
            self._units += 1
            try:
                yield con
            finally:
                self._units -= 1
                con.close()

    @contextmanager
    def transaction(self) -> Iterator[duckdb.DuckDBPyConnection]:
        """One connection, one transaction: committed on success, rolled back on any error."""
        with self.connect() as con:
            con.execute("BEGIN TRANSACTION")
            try:
                yield con
            except BaseException:
                con.execute("ROLLBACK")
                raise
            con.execute("COMMIT")

    @contextmanager
    def hold(self) -> Iterator[None]:
        """Keep the store open across the units of work inside (see the module notes).

        Nested holds share the outer one's connection; the hold that opened it closes it
        (and with it DuckDB checkpoints once), unless :meth:`let_go` already did. A hold
        is only a saving, never a lock: after HOLD_LIMIT_S seconds the next unit lets go
        first, so a long backlog of drop files goes back to short connections and other
        processes get their turns; a nested hold then opens afresh.
        """
        with self._lock:
            opened_here = self._held is None
            if opened_here:
                self._held = self._open_with_retry()
                self._held_since = time.monotonic()
        try:
            yield
        finally:
            if opened_here:
                self.let_go()

    def let_go(self) -> None:
        """Close a held connection now; later units open their own, as outside a hold."""
        with self._lock:
            con, self._held = self._held, None
            if con is not None:
                con.close()

    @property
    def is_held(self) -> bool:
        return self._held is not None

    def _open_with_retry(self) -> duckdb.DuckDBPyConnection:
        deadline = time.monotonic() + self.busy_timeout
        delay = 0.02
        while True:
            try:
                return duckdb.connect(str(self.path), config={
                    "threads": "2",
                    # DuckDB defaults to 80% of the machine; bounded, it keeps a 500 x 15,000
                    # store's refit and writes within the memory target and spills the rest
                    "memory_limit": f"{self.memory_limit_mb}MB",
                })
            except duckdb.Error as exc:
                if not _is_lock_conflict(exc):
                    raise StoreError(_describe_open_error(self.path, exc)) from exc
                if time.monotonic() >= deadline:
                    raise StoreBusy(
                        f"store {self.path} is held by another process for more than "
                        f"{self.busy_timeout:g} s; try again, or raise [store] busy_timeout_s"
                    ) from exc
                time.sleep(delay * (0.5 + random.random()))
                delay = min(delay * 2, 0.5)


def _describe_open_error(path: Path, exc: Exception) -> str:
    text = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
    if "not a valid duckdb" in text.lower() or "invalid" in text.lower() or "corrupt" in text.lower():
        return f"store {path} is not a readable DuckDB store file ({text})"
    return f"cannot open store {path}: {text}"


def schema_version(con: duckdb.DuckDBPyConnection) -> int:
    if not con.execute(sql("catalog.has_migrations_table")).fetchone()[0]:
        return 0
    return int(con.execute(sql("catalog.schema_version")).fetchone()[0])


def migrate(con: duckdb.DuckDBPyConnection) -> list[int]:
    """Apply the pending migrations in order, all in one transaction; return their versions."""
    con.execute(sql("catalog.create_migrations_table"))
    current = schema_version(con)
    known = migrations()
    if current > len(known):
        raise StoreError(
            f"store schema version {current} is newer than this program knows ({len(known)}); upgrade the tool"
        )
    applied = []
    pending = [m for m in known if m.version > current]
    if not pending:
        return applied
    con.execute("BEGIN TRANSACTION")
    try:
        for m in pending:
            con.execute(m.text)
            con.execute(sql("catalog.record_migration"), [m.version, m.name])
            applied.append(m.version)
    except BaseException:
        con.execute("ROLLBACK")
        raise
    con.execute("COMMIT")
    return applied


def check_writable_folder(folder: Path) -> None:
    """Create ``folder`` if needed and fail with one line when it cannot be written."""
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise StoreError(f"cannot create store folder {folder}: {exc.strerror or exc}") from exc
    if not os.access(folder, os.W_OK | os.X_OK):
        raise StoreError(f"store folder {folder} is not writable")
