"""One interface for fanning refits out: in process, local processes, or Dask.

Each task is a top-level picklable function applied to one picklable item; results come
back in input order (or, with ``ordered=False``, as they finish), and every executor
gives identical results.
"""

from __future__ import annotations

import multiprocessing
import os
import pickle
import sys
import threading
import traceback
from collections import deque
from collections.abc import Callable, Iterable, Iterator
from contextlib import contextmanager
from concurrent.futures import FIRST_COMPLETED, ProcessPoolExecutor, wait
from itertools import islice
from typing import Any, Protocol


class Executor(Protocol):
    def map(self, fn: Callable[[Any], Any], items: Iterable[Any], *, ordered: bool = True) -> Iterator[Any]: ...


class SerialExecutor:
    """Runs tasks one after another in this process (tests, tiny stores)."""

    def map(self, fn, items, *, ordered: bool = True):
        for item in items:
            yield fn(item)


class LocalProcessExecutor:
    """Local worker processes; the default. ``workers=None`` uses the machine's cores."""

    def __init__(self, workers: int | None = None) -> None:
        self.workers = workers or max(1, os.cpu_count() or 1)

    def map(self, fn, items, *, ordered: bool = True):
        """Results in input order (``ordered=False``: as they finish), with at most a window
        of tasks submitted and not yet taken.

        ``ProcessPoolExecutor.map`` submits every task at once, and finished results wait
        in memory until the caller takes them: a refit of 500 long histories, whose caller
        writes as it goes, held hundreds of whole-history outputs that way (2.8 GB). The
        next task is submitted before a result is handed over, so the workers stay busy
        while the caller works. Unordered, a long task holds one slot of the window
        instead of stalling every result behind it. Tasks not yet started are cancelled
        when the caller stops early or a task fails.
        """
        items = list(items)
        if self.workers == 1 or len(items) <= 1:
            yield from SerialExecutor().map(fn, items)
            return
        workers = min(self.workers, len(items))
        window = max(4 * workers, 8)
        with ProcessPoolExecutor(max_workers=workers, mp_context=worker_context()) as pool:
            rest = iter(items)
            pending = deque(pool.submit(fn, item) for item in islice(rest, window))
            try:
                while pending:
                    if ordered:
                        fut = pending.popleft()
                    else:
                        done, _ = wait(pending, return_when=FIRST_COMPLETED)
                        fut = next(f for f in pending if f in done)   # the earliest finished
                        pending.remove(fut)
                    result = fut.result()
                    for item in islice(rest, 1):
                        pending.append(pool.submit(fn, item))
                    yield result
            finally:
                for fut in pending:
                    fut.cancel()


def worker_context():
    """Start method of local workers: fork on Linux, the platform's default elsewhere.

    Forked workers start at once with the modules already imported. Spawned ones (the
    default under a parent started by spawn, and forkserver from Python 3.14) import
    numpy, pandas, scipy and statsmodels again, 2 to 3 s per worker on 2 cores: more than
    a whole 10-factor refit. Workers only fit models on the arrays handed to them; they
    never touch the store's connection, so forking beside DuckDB's threads is safe here.
    """
    if sys.platform.startswith("linux"):
        return multiprocessing.get_context("fork")
    return None


class DaskExecutor:
    """A Dask distributed cluster at ``address`` (``[service] dask_scheduler`` in the config)."""

    def __init__(self, address: str) -> None:
        self.address = address

    def map(self, fn, items, *, ordered: bool = True):
        from distributed import Client, as_completed  # optional dependency: the `dask` extra

        with Client(self.address) as client:
            futures = client.map(fn, list(items), pure=False)
            for fut in (futures if ordered else as_completed(futures)):
                yield fut.result()


def one_blas_thread():
    """A context in which BLAS runs on one thread (threadpoolctl).

    Every refit task runs in one, whichever executor runs it: results are then the same in
    process, in local workers and on Dask (threaded reductions may differ in the last
    bit), and workers do not oversubscribe the cores. Measured on the market fit (10
    factors x 6,500 days, 2 cores): 8.1 s wall with two BLAS threads, 2.3 s with one;
    its matrices are too small for threads to pay.
    """
    from threadpoolctl import threadpool_limits

    return threadpool_limits(limits=1, user_api="blas")


def executor_for(config) -> Executor:
    """The executor the configuration asks for: Dask when a scheduler is set, else local processes."""
    address = config.service.dask_scheduler
    if address and address != "none":
        return DaskExecutor(address)
    return LocalProcessExecutor(config.service.workers)


def fork_split(fn: Callable[[Any], Any], parts: list) -> list:
    """``[fn(p) for p in parts]``, with ``parts[1:]`` each in a forked child process and
    ``parts[0]`` in this one, at the same time.

    For work too short to pay for a pool or for pickling its inputs (a day's update of
    hundreds of factors, ~1 s): a forked child starts in milliseconds with this process's
    memory, so ``fn`` may be a closure over large inputs; only the results travel back,
    pickled through a pipe. A child's exception is raised here. Serial where fork is not
    the start method (see :func:`worker_context`).
    """
    with forked_parts(fn, parts) as results:
        return list(results)


@contextmanager
def forked_parts(fn: Callable[[Any], Any], parts: list) -> Iterator[Iterator[Any]]:
    """:func:`fork_split` as an iterator of the results in ``parts`` order, so that the
    caller can use this process's own result (``parts[0]``'s, first) while the children
    still run. Leaving the block before every result was taken (an error) stops the
    children that are left.

    Each child's pipe is drained by a thread of this process as soon as the child sends
    (:class:`_Receiver`): a few MB take ~10 ms through a pipe on a small machine, which
    then overlap the caller's own work instead of starting when it asks for the result."""
    ctx = worker_context()
    if len(parts) <= 1 or ctx is None:
        yield (fn(p) for p in parts)
        return
    children: list[tuple[Any, _Receiver]] = []
    taken = 0

    def results():
        nonlocal taken
        yield fn(parts[0])
        for proc, receiver in children:
            receiver.join()
            if receiver.data is None:
                proc.join()
                raise RuntimeError(f"a forked worker ended without a result (exit code {proc.exitcode})") from None
            ok, value = pickle.loads(receiver.data)
            receiver.data = None
            if not ok:
                raise value
            taken += 1
            yield value

    try:
        for part in parts[1:]:
            receive, send = ctx.Pipe(duplex=False)
            proc = ctx.Process(target=_forked_part, args=(fn, part, send), daemon=True)
            proc.start()
            send.close()
            receiver = _Receiver(receive)
            receiver.start()
            children.append((proc, receiver))
        yield results()
    finally:
        if taken < len(children):                # a part failed or was not waited for: stop the rest
            for proc, _ in children:
                proc.terminate()
        for proc, receiver in children:
            proc.join()
            receiver.join()                      # the child's end is closed: EOF at the latest
            receiver.receive.close()


class _Receiver(threading.Thread):
    """Reads one forked part's pickled result from its pipe (None: the pipe closed first)."""

    def __init__(self, receive) -> None:
        super().__init__(daemon=True)
        self.receive = receive
        self.data: bytes | None = None

    def run(self) -> None:
        try:
            self.data = self.receive.recv_bytes()
        except (EOFError, OSError):
            self.data = None


def _forked_part(fn, part, send) -> None:
    _leave_the_parent_alone()
    try:
        try:
            result = (True, fn(part))
        except BaseException as exc:            # handed to the parent, raised there
            exc.add_note("in a forked worker:\n" + "".join(traceback.format_exception(exc)))
            result = (False, exc)
        try:
            send.send(result)
        except Exception as exc:                # an unpicklable result or exception
            send.send((False, RuntimeError(f"a forked worker's result could not be returned: {exc!r}")))
    finally:
        send.close()


def _leave_the_parent_alone() -> None:
    """A forked part writes nothing to the parent's terminal and takes none of its signals.

    Under the interface the parent's ``sys.stdout``/``sys.stderr`` are the UI's capture
    objects (a warning written through them from a child, with no event loop there, could
    block), and the parent's signal wake-up descriptor is shared: a signal handled in the
    child would be read by the UI's loop as its own. The child gets the null device and
    the default handlers; its result or exception still travels back through the pipe.
    """
    import signal

    try:
        signal.set_wakeup_fd(-1)
    except (ValueError, OSError):
        pass
    for sig in (signal.SIGTERM, signal.SIGHUP):
        signal.signal(sig, signal.SIG_DFL)
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    sink = open(os.devnull, "w")
    sys.stdout = sys.stderr = sink
