"""The live loop behind the screens, with no Textual in it: one *pass* at a time.

A pass, run in a worker thread every ``[ui] refresh_s`` seconds:

1. applies the drop files waiting in the inbox (``process_inbox``, when the ingest layer
   is installed);
2. reloads the board and hands it on if anything on it changed (new rows show at once,
   before estimation);
3. runs :func:`tracker.service.estimate.update` when it is needed -- on the first pass
   (estimates may be missing or behind), when the store's data version moved since the
   last completed update, when an update was skipped because another process held the
   estimation lock, or when a refit was asked for -- reporting progress as it goes;
4. reloads the board again after an update.

Every store access is one short connection (``Store.connect``), so a second process on
the same store works; a pass holds the store open across them (``Store.hold``: ~1 s for a
day's drop and update), letting go before any refit. Stopping: :attr:`LiveLoop.stop` is
checked at every progress step and between fits; a run in flight is abandoned before it writes anything (``update``
writes all results in one transaction at the end) and its worker processes are
terminated, so quitting never waits for a long refit.
"""

from __future__ import annotations

import json
import multiprocessing
import os
import signal
import sys
import threading
from collections.abc import Callable
from dataclasses import dataclass, field
from datetime import datetime

from tracker.config import Config
from tracker.service.views import Board, load_board
from tracker.store.connection import Store
from tracker.store.errors import StoreBusy

# The ingest layer is part of the product: a broken import must fail loudly, not leave a
# UI that silently never applies the inbox (it once did, when pyarrow was missing).
from tracker.ingest.inbox import process_inbox as _process_inbox

Ingest = Callable[[Store, Config], list]
DEFAULT_INGEST: Ingest | None = _process_inbox


class EstimationCancelled(Exception):
    """The app is closing: the estimation run was abandoned before writing."""


class CancellableExecutor:
    """Runs refits in local worker processes and stops them when ``stop`` is set.

    Same contract and start method as :class:`tracker.service.executor.LocalProcessExecutor`
    (forked local processes, results in input order unless ``ordered=False``), but the
    pool is terminated as soon as ``stop`` is set, and each worker sends its output to the
    null device: the terminal belongs to the UI, and a warning printed by a fit would
    scribble over the screen.
    (Spawned or fork-server workers are not an option inside Textual: starting them asks
    for ``sys.stderr.fileno()``, which Textual's print capture answers with -1.)
    """

    def __init__(self, stop: threading.Event, workers: int | None = None, poll_s: float = 0.2) -> None:
        self.stop = stop
        self.workers = workers or max(1, os.cpu_count() or 1)
        self.poll_s = poll_s

    def map(self, fn, items, *, ordered: bool = True):
        items = list(items)
        if self.workers == 1 or len(items) <= 1:
            for item in items:
                self._check()
                yield fn(item)
            return
        ctx = multiprocessing.get_context("fork")
        pool = ctx.Pool(min(self.workers, len(items)), initializer=_quiet_worker)
        try:
            results = pool.imap(fn, items) if ordered else pool.imap_unordered(fn, items)
            for _ in items:
                while True:
                    self._check()
                    try:
                        value = results.next(timeout=self.poll_s)
                    except multiprocessing.TimeoutError:
                        continue
                    break
                yield value
        except BaseException:
            pool.terminate()
            raise
        else:
            pool.close()
        finally:
            pool.join()

    def _check(self) -> None:
        if self.stop.is_set():
            raise EstimationCancelled()


def _quiet_worker() -> None:
    # A forked worker inherits the UI's signal wake-up descriptor: left alone, the SIGTERM
    # that ends a worker would be read by the UI's event loop as its own and close the app.
    try:
        signal.set_wakeup_fd(-1)
    except (ValueError, OSError):
        pass
    signal.signal(signal.SIGTERM, signal.SIG_DFL)
    signal.signal(signal.SIGHUP, signal.SIG_DFL)
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    devnull = os.open(os.devnull, os.O_WRONLY)
    os.dup2(devnull, 1)
    os.dup2(devnull, 2)
    sys.stdout = sys.stderr = open(os.devnull, "w")  # noqa: SIM115 - lives as long as the worker


def board_fingerprint(board: Board) -> str:
    """Equal for two boards that look the same (repr, since NaN != NaN)."""
    return repr((board.version, board.header, board.market, board.rows))


def data_version(board: Board) -> str | None:
    try:
        return json.loads(board.version).get("data_version")
    except (TypeError, ValueError, AttributeError):
        return None


@dataclass
class PassReport:
    checked_at: datetime
    drops: list[str] = field(default_factory=list)
    applied: int = 0
    rejected: int = 0
    estimation: str = ""
    error: str = ""


class LiveLoop:
    """State kept between passes; :meth:`run_pass` is called from one worker thread at a time.

    Parameters
    ----------
    store, config
    on_board : callable(Board)
        Called with each board that differs from the previous one handed on.
    on_activity : callable(text, done, total, busy)
        Called with what the pass is doing now (from the worker thread).
    ingest : callable(store, config) -> list of Outcome, or None
        ``process_inbox`` by default; None when the ingest layer is not installed.
    clock : callable() -> datetime
    """

    def __init__(self, store: Store, config: Config, *, on_board: Callable[[Board], None],
                 on_activity: Callable[[str, int, int, bool], None],
                 ingest: Ingest | None = DEFAULT_INGEST, clock: Callable[[], datetime] = datetime.now) -> None:
        self.store = store
        self.config = config
        self.on_board = on_board
        self.on_activity = on_activity
        self.ingest = ingest
        self.clock = clock
        self.stop = threading.Event()
        self._lock = threading.Lock()
        self._refit: set[str] | None = None
        self._need_update = True
        self._updated_data_version: str | None = None
        self._posted: str | None = None
        self.last_board: Board | None = None

    # ---------------------------------------------------------------- requests

    def request_refit(self, factors: set[str] | None = None) -> None:
        """Ask the next pass to refit ``factors`` (None or empty: all factors)."""
        factors = set(factors or ())
        with self._lock:
            if self._refit is None:
                self._refit = factors
            elif not self._refit or not factors:
                self._refit = set()
            else:
                self._refit |= factors

    def refit_pending(self) -> bool:
        with self._lock:
            return self._refit is not None

    def _take_refit(self) -> set[str] | None:
        with self._lock:
            req, self._refit = self._refit, None
            return req

    # ---------------------------------------------------------------- one pass

    def run_pass(self) -> PassReport:
        report = PassReport(checked_at=self.clock())
        try:
            # one open of the store for the whole pass (a refit lets go of it: Store.hold)
            with self.store.hold():
                self._pass(report)
        except EstimationCancelled:
            report.estimation = "stopped before writing: the app is closing"
        except StoreBusy as exc:
            report.error = f"store busy, will retry: {exc}"
        except Exception as exc:  # the next pass retries; the screen says what went wrong
            report.error = f"{type(exc).__name__}: {exc}"
        return report

    def _pass(self, report: PassReport) -> None:
        if self.last_board is None:
            self._load()
        self._apply_drops(report)
        board = self._load()
        if data_version(board) != self._updated_data_version:
            self._need_update = True
        refit = self._take_refit()
        if (self._need_update or refit is not None) and not self.stop.is_set():
            self._estimate(report, refit, data_version(board))
            self._load()

    def _load(self) -> Board:
        board = load_board(self.store, self.config)
        self.last_board = board
        fp = board_fingerprint(board)
        if fp != self._posted:
            self._posted = fp
            self.on_board(board)
        return board

    def _apply_drops(self, report: PassReport) -> None:
        if self.ingest is None:
            return
        from tracker.service.status import pending_drop_files

        waiting = pending_drop_files(self.config.inbox_path(self.store.folder))
        if waiting:
            self.on_activity(f"applying {len(waiting)} drop file(s)", 0, 0, True)
        outcomes = self.ingest(self.store, self.config) or []
        for o in outcomes:
            report.drops.append(_short(o))
            if getattr(o, "outcome", "") == "applied":
                report.applied += 1
                self._need_update = True
            elif getattr(o, "outcome", "") == "rejected":
                report.rejected += 1

    def _estimate(self, report: PassReport, refit: set[str] | None, version: str | None) -> None:
        what = "refitting" if refit is not None else "estimating"
        if refit:
            what += " " + ", ".join(sorted(refit))

        def progress(done: int, total: int, label: str) -> None:
            if self.stop.is_set():
                raise EstimationCancelled()
            self.on_activity(f"{what}: {'started' if label == 'estimating' else label}", done, total, True)

        from tracker.service.estimate import update  # deferred: the first screen is drawn before this import

        self.on_activity(f"{what}: reading inputs", 0, 0, True)
        try:
            summary = update(self.store, self.config, refit=refit, progress=progress,
                             executor=CancellableExecutor(self.stop))
        except BaseException:
            if refit is not None:
                self.request_refit(refit)  # not done: keep the request for the next pass
            raise
        report.estimation = summary.describe()
        if summary.skipped:
            self._need_update = True
            if refit is not None:
                self.request_refit(refit)
        else:
            self._need_update = False
            self._updated_data_version = version


def _short(outcome) -> str:
    """One short line for a notification; the inbox screen has the whole story."""
    kind = getattr(outcome, "outcome", "?")
    line = f"{kind} {getattr(outcome, 'file_name', '?')}"
    if kind == "rejected" and getattr(outcome, "reason", None):
        line += f": {outcome.reason}"
    elif kind == "applied":
        rows = sum(getattr(outcome, "rows_written", {}).values()) if hasattr(outcome, "rows_written") else 0
        line += f": {rows} rows, {getattr(outcome, 'n_revisions', 0)} revision(s)"
    return line
