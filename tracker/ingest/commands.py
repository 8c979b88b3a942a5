"""The two commands the CLI wires in: ``tracker ingest [FILE...]`` and ``tracker watch``."""

from __future__ import annotations

import threading
from collections.abc import Callable
from pathlib import Path

from tracker.config import Config
from tracker.ingest.inbox import (
    PROCESSING,
    OnApplied,
    claim,
    claim_copy,
    inbox_folders,
    process_claimed,
    process_inbox,
    recover_claims,
)
from tracker.ingest.outcome import Outcome
from tracker.store.connection import Store
from tracker.store.errors import StoreBusy

Echo = Callable[[str], None]


def _report(outcome: Outcome, echo: Echo) -> None:
    echo(outcome.summary())
    if outcome.receipt is not None:
        echo(f"  receipt: {outcome.receipt}")


def ingest_command(store: Store, config: Config, paths: list[Path] | None, echo: Echo) -> int:
    """Process the inbox once (``paths`` None) or the given files; 1 if any was rejected.

    A named file inside the inbox is claimed where it is; a file elsewhere is copied into
    a claim (the original is left untouched); a folder stands for its ``*.sql`` files.
    A missing path is reported and counts as a failure. Files move to the inbox's
    ``applied/`` or ``rejected/`` with a receipt, as with the watcher.
    """
    folders = inbox_folders(config.inbox_path(store.folder))
    failed = False
    outcomes: list[Outcome] = []
    if paths is None:
        outcomes = process_inbox(store, config)
        for o in outcomes:
            _report(o, echo)
    else:
        for o in recover_claims(store, config):
            outcomes.append(o)
            _report(o, echo)
        for path in _expand(paths, echo):
            if path is None:
                failed = True
                continue
            if path.parent.resolve() == folders["inbox"]:
                got = claim(path, folders[PROCESSING])
                if got is None:
                    echo(f"{path.name}: taken by another process meanwhile")
                    continue
            else:
                got = claim_copy(path, folders[PROCESSING])
            o = process_claimed(store, config, got[0], got[1])
            outcomes.append(o)
            _report(o, echo)
    counts = {k: sum(o.outcome == k for o in outcomes) for k in ("applied", "duplicate", "rejected")}
    echo(f"{counts['applied']} applied, {counts['duplicate']} duplicate, {counts['rejected']} rejected")
    return 1 if failed or counts["rejected"] else 0


def _expand(paths: list[Path], echo: Echo):
    for p in paths:
        p = Path(p).expanduser()
        if p.is_dir():
            yield from sorted(q for q in p.iterdir() if q.is_file() and q.name.endswith(".sql")
                              and not q.name.startswith("."))
        elif p.is_file():
            yield p
        else:
            echo(f"{p}: no such file")
            yield None


def watch_command(store: Store, config: Config, echo: Echo, stop_event: threading.Event,
                  on_applied: OnApplied | None = None) -> int:
    """Process the inbox every ``[ingest] poll_s`` seconds until ``stop_event`` is set.

    A busy store or an error in one pass is reported and retried at the next poll; the
    watcher itself only stops when asked. Returns 0.
    """
    inbox = config.inbox_path(store.folder)
    echo(f"watching {inbox} every {config.ingest.poll_s:g} s")
    while not stop_event.is_set():
        try:
            for o in process_inbox(store, config, on_applied):
                _report(o, echo)
        except StoreBusy as exc:
            echo(f"store busy, will retry: {exc}")
        except Exception as exc:  # keep watching: the next pass recovers what this one left
            echo(f"error in this pass, will retry: {type(exc).__name__}: {exc}")
        stop_event.wait(config.ingest.poll_s)
    return 0
