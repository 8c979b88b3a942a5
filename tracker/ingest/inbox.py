"""The inbox: picking up drop files, claiming them, moving them, receipts, recovery.

Layout under the inbox folder (``[store] inbox``, default ``<store folder>/inbox``)::

    inbox/*.sql                    waiting; only these are picked up
    inbox/processing/<name>.<pid>.<token>   claimed by process <pid>
    inbox/applied/<name>           applied (or a duplicate of an applied file)
    inbox/applied/<name>.receipt.json
    inbox/rejected/<name>          rejected, never deleted
    inbox/rejected/<name>.receipt.json

Picking up: files directly in ``inbox/`` whose name ends in ``.sql`` and does not start
with ``.``, oldest modification time first (name breaks ties). Writers write under a
hidden or temporary name (``.name.sql``, ``name.sql.tmp``, ``name.sql.part``) and rename
when done, so a half-written file is never read.

Claiming: one atomic rename into ``processing/`` with this process's pid and a random
token. Of two processes watching one inbox, exactly one rename succeeds, so no file is
processed twice. The token is recorded in ``drop_files.claim_token`` in the same
transaction as the data.

Finishing: the file is hard-linked into ``applied/`` (outcomes 'applied' and
'duplicate') or ``rejected/`` under its own name -- or ``<stem>.<drop_id>.sql`` when that
name is taken, and never over an existing file -- its receipt is written beside it
(atomically, through a temporary name), and the claim is unlinked.

Recovery, at the start of every pass: a claim whose owner process is gone (or this
process's own claim that no worker holds any more) is re-claimed by renaming it to this
pid with the same token. If ``drop_files`` has a row with that token, the outcome was
committed and only the move is finished; otherwise nothing of the file reached the store
and it is processed again. Files are never deleted and never left in the inbox once
processed; a crash at any point leaves each file either fully applied and moved, or
not applied and still claimable.

Size: a file larger than ``[ingest] max_file_mb`` MiB (2**20 bytes) is rejected unread
(rule ``file_too_large``; its sha256 is recorded as '').
"""

from __future__ import annotations

import json
import os
import secrets
import threading
import shutil
import time
from collections.abc import Callable
from dataclasses import replace
from datetime import date, datetime
from pathlib import Path

import duckdb

from tracker.config import Config
from tracker.ingest.apply import DropMeta, first_row, ingest_bytes, record_rejection, sha256_of
from tracker.ingest.outcome import Outcome, Rejection, TableCounts
from tracker.store.connection import Store
from tracker.store.errors import StoreError
from tracker.store.sqlfiles import sql

PROCESSING, APPLIED, REJECTED = "processing", "applied", "rejected"
RECEIPT_SUFFIX = ".receipt.json"
OnApplied = Callable[[Outcome], None]

_active_tokens: set[str] = set()
_active_guard = threading.Lock()


def inbox_folders(inbox: Path) -> dict[str, Path]:
    folders = {"inbox": inbox, PROCESSING: inbox / PROCESSING, APPLIED: inbox / APPLIED,
               REJECTED: inbox / REJECTED}
    for p in folders.values():
        p.mkdir(parents=True, exist_ok=True)
    return folders


def pending_files(inbox: Path) -> list[Path]:
    """Drop files waiting in ``inbox``: ``*.sql``, not hidden, oldest first."""
    found = []
    try:
        entries = list(os.scandir(inbox))
    except FileNotFoundError:
        return []
    for e in entries:
        if e.name.startswith(".") or not e.name.endswith(".sql"):
            continue
        try:
            if e.is_file(follow_symlinks=False):
                found.append((e.stat().st_mtime_ns, e.name, Path(e.path)))
        except FileNotFoundError:
            continue  # claimed by another process meanwhile
    return [p for _, _, p in sorted(found)]


def _claim_name(name: str, token: str) -> str:
    return f"{name}.{os.getpid()}.{token}"


def parse_claim(claim: str) -> tuple[str, int, str] | None:
    """(original name, owner pid, token) of a ``processing/`` name, or None for a foreign file."""
    parts = claim.rsplit(".", 2)
    if len(parts) != 3 or not parts[1].isdigit() or len(parts[2]) != 16:
        return None
    try:
        int(parts[2], 16)
    except ValueError:
        return None
    return parts[0], int(parts[1]), parts[2]


def _activate(token: str) -> None:
    with _active_guard:
        _active_tokens.add(token)


def _deactivate(token: str) -> None:
    with _active_guard:
        _active_tokens.discard(token)


def _is_active(token: str) -> bool:
    with _active_guard:
        return token in _active_tokens


def claim(path: Path, processing: Path, token: str | None = None) -> tuple[Path, str] | None:
    """Rename ``path`` into ``processing/``; None if another process got there first."""
    reclaim = path.parent == processing
    token = token or secrets.token_hex(8)
    name = parse_claim(path.name)[0] if reclaim else path.name
    target = processing / _claim_name(name, token)
    _activate(token)
    try:
        os.rename(path, target)
    except FileNotFoundError:
        _deactivate(token)
        return None
    return target, token


def claim_copy(src: Path, processing: Path) -> tuple[Path, str]:
    """Copy a file from outside the inbox straight into a claim of this process."""
    token = secrets.token_hex(8)
    name = src.name if src.name.endswith(".sql") else src.name + ".sql"
    _activate(token)
    tmp = processing / f".{name}.{os.getpid()}.{token}.part"
    try:
        shutil.copyfile(src, tmp)
        target = processing / _claim_name(name, token)
        os.rename(tmp, target)
    except BaseException:
        _deactivate(token)
        tmp.unlink(missing_ok=True)
        raise
    return target, token


def owner_alive(pid: int, token: str, claimed: Path) -> bool:
    """Whether the process that claimed a file may still be working on it."""
    if pid == os.getpid():
        return _is_active(token)
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        pass
    try:
        stat = Path(f"/proc/{pid}/stat").read_text()
        boot = next(float(line.split()[1]) for line in Path("/proc/stat").read_text().splitlines()
                    if line.startswith("btime"))
    except (OSError, StopIteration, ValueError):
        return True  # not Linux: trust the signal check
    fields = stat[stat.rindex(")") + 2:].split()
    if fields[0] in ("Z", "X"):
        return False  # exited, not yet reaped
    started = boot + int(fields[19]) / os.sysconf("SC_CLK_TCK")
    try:
        claimed_at = claimed.stat().st_ctime
    except FileNotFoundError:
        return True
    return started <= claimed_at + 1.0  # a process started after the claim reuses the pid


def process_inbox(store: Store, config: Config, on_applied: OnApplied | None = None, *,
                  today: date | None = None) -> list[Outcome]:
    """One pass: recover dead claims, then process every file waiting in the inbox.

    ``on_applied(outcome)`` is called for each applied file after its transaction
    committed and the file was moved (ingestion itself never runs estimation). An
    exception it raises stops the pass; the files not reached stay in the inbox.
    Outcomes 'rejected' and 'duplicate' are returned but not passed to it.
    """
    folders = inbox_folders(config.inbox_path(store.folder))
    outcomes: list[Outcome] = []

    def done(outcome: Outcome) -> None:
        outcomes.append(outcome)
        if on_applied is not None and outcome.outcome == "applied":
            on_applied(outcome)

    for outcome in recover_claims(store, config, today=today):
        done(outcome)
    for path in pending_files(folders["inbox"]):
        got = claim(path, folders[PROCESSING])
        if got is not None:
            # one open of the store a file (Store.hold); between files another process may
            # take the store
            with store.hold():
                done(process_claimed(store, config, got[0], got[1], today=today))
    return outcomes


def recover_claims(store: Store, config: Config, *, today: date | None = None) -> list[Outcome]:
    """Finish or redo the files left in ``processing/`` by processes that are gone."""
    folders = inbox_folders(config.inbox_path(store.folder))
    processing = folders[PROCESSING]
    _sweep_temporaries(folders)
    outcomes = []
    for path in sorted(processing.iterdir()):
        parsed = parse_claim(path.name)
        if parsed is None or not path.is_file():
            continue
        name, pid, token = parsed
        if owner_alive(pid, token, path):
            continue
        got = claim(path, processing, token)
        if got is None:
            continue
        claimed, token = got
        try:
            with store.connect() as con:
                row = first_row(con.execute(sql("ingest.drop_by_claim_token"), [token]))
        except BaseException:
            _deactivate(token)
            raise
        if row is None:
            outcomes.append(process_claimed(store, config, claimed, token, today=today))
        else:
            outcomes.append(_finish_recorded(store, config, claimed, token, row))
    return outcomes


def _sweep_temporaries(folders: dict[str, Path]) -> None:
    """Remove this module's own temporary files (receipts, copies) left by dead processes."""
    for key in (PROCESSING, APPLIED, REJECTED):
        for path in folders[key].glob(".*.*.*.*"):
            parts = path.name.rsplit(".", 3)
            if len(parts) != 4 or parts[3] not in ("tmp", "part") or not parts[1].isdigit():
                continue
            pid = int(parts[1])
            if pid != os.getpid() and not owner_alive(pid, "", path):
                path.unlink(missing_ok=True)


def _finish_recorded(store: Store, config: Config, claimed: Path, token: str, row) -> Outcome:
    drop_id, outcome, reason, rows_json, n_revisions, warnings_json, sha, file_name, size, received, _ = row
    rows = {t: TableCounts(inserted=int(n)) for t, n in json.loads(rows_json).items()}
    warnings = json.loads(warnings_json)
    dup_of = None
    if outcome == "duplicate" and reason:
        digits = [w for w in reason.replace(",", " ").split() if w.isdigit()]
        dup_of = int(digits[0]) if digits else None
    result = Outcome(outcome=outcome, file_name=file_name, drop_id=int(drop_id), sha256=sha,
                     size_bytes=int(size), received_at=received, reason=reason,
                     rule=_rule_of(reason) if outcome == "rejected" else None, rows=rows,
                     n_revisions=int(n_revisions), n_warnings=len(warnings), duplicate_of=dup_of,
                     recovered=True)
    try:
        return finish(claimed, result, config.inbox_path(store.folder), raw_warnings=warnings)
    finally:
        _deactivate(token)


def _rule_of(reason: str | None) -> str | None:
    if reason and reason.endswith(")") and "(rule: " in reason:
        return reason.rsplit("(rule: ", 1)[1][:-1]
    return None


def process_claimed(store: Store, config: Config, claimed: Path, token: str, *,
                    today: date | None = None) -> Outcome:
    """Process one claimed file to a recorded outcome, then move it and write its receipt.

    Store errors (busy, unreadable) propagate and leave the claim for the next pass's
    recovery; any other failure is recorded as a rejection (rule ``internal_error``)
    so a file that trips a bug is not retried for ever.
    """
    name = parse_claim(claimed.name)[0]
    inbox = config.inbox_path(store.folder)
    try:
        outcome = _ingest_claimed(store, config, claimed, name, token, today)
    except (StoreError, duckdb.Error, OSError, KeyboardInterrupt, SystemExit):
        _deactivate(token)
        raise
    except Exception as exc:  # a bug: record it instead of retrying the file for ever
        try:
            meta = DropMeta(name, token, _size(claimed), "", datetime.now())
            outcome = record_rejection(store, meta, Rejection(
                "internal_error", f"the file could not be processed: {type(exc).__name__}: {exc}"))
        except BaseException:
            _deactivate(token)
            raise
    try:
        return finish(claimed, outcome, inbox)
    finally:
        _deactivate(token)


def _size(path: Path) -> int:
    try:
        return path.stat().st_size
    except OSError:
        return 0


def _ingest_claimed(store: Store, config: Config, claimed: Path, name: str, token: str,
                    today: date | None) -> Outcome:
    received_at = datetime.now()
    size = claimed.stat().st_size
    limit = config.ingest.max_file_mb * 2**20
    if size > limit:
        meta = DropMeta(name, token, size, "", received_at)
        return record_rejection(store, meta, Rejection(
            "file_too_large", f"the file is {size / 2**20:.1f} MiB, over [ingest] max_file_mb = "
            f"{config.ingest.max_file_mb:g}; it was not read"))
    data = claimed.read_bytes()
    meta = DropMeta(name, token, len(data), sha256_of(data), received_at)
    return ingest_bytes(store, config, data, meta, today=today)


def _candidates(name: str, drop_id: int | None):
    yield name
    stem, dot, suffix = name.rpartition(".")
    stem, suffix = (stem, "." + suffix) if dot else (name, "")
    yield f"{stem}.{drop_id}{suffix}"
    k = 1
    while True:
        yield f"{stem}.{drop_id}.{k}{suffix}"
        k += 1


def _same_file(a: Path, b: Path) -> bool:
    try:
        return os.path.samefile(a, b)
    except OSError:
        return False


def _receipt_drop_id(path: Path) -> int | None:
    try:
        return json.loads(path.read_text("utf-8")).get("drop_id")
    except (OSError, ValueError, AttributeError):
        return None


def finish(claimed: Path, outcome: Outcome, inbox: Path, *, raw_warnings: list | None = None) -> Outcome:
    """Move a claimed file whose outcome is recorded into applied/ or rejected/, with its receipt."""
    dest = inbox / (REJECTED if outcome.outcome == "rejected" else APPLIED)
    dest.mkdir(parents=True, exist_ok=True)
    for cand in _candidates(outcome.file_name, outcome.drop_id):
        target, receipt = dest / cand, dest / (cand + RECEIPT_SUFFIX)
        if receipt.exists() and _receipt_drop_id(receipt) != outcome.drop_id:
            continue
        try:
            os.link(claimed, target)
        except FileExistsError:
            if not _same_file(claimed, target):
                continue
        except FileNotFoundError:
            if target.exists() and _receipt_drop_id(receipt) == outcome.drop_id:
                break  # another recoverer finished this very claim
            raise
        except OSError:  # no hard links here: a checked rename is the next best thing
            if target.exists():
                continue
            os.rename(claimed, target)
        break
    outcome = replace(outcome, stored_as=target, receipt=receipt)
    _write_receipt(receipt, outcome, raw_warnings)
    try:
        claimed.unlink()
    except FileNotFoundError:
        pass
    return outcome


def receipt_dict(outcome: Outcome, raw_warnings: list | None = None) -> dict:
    warnings = raw_warnings if raw_warnings is not None else [w.to_dict() for w in outcome.warnings]
    if raw_warnings is None and outcome.n_warnings > len(outcome.warnings):
        warnings = warnings + [{"code": "more_warnings", "count": outcome.n_warnings - len(outcome.warnings)}]
    out = {
        "drop_id": outcome.drop_id,
        "file": outcome.file_name,
        "stored_as": outcome.stored_as.name if outcome.stored_as else None,
        "outcome": outcome.outcome,
        "reason": outcome.reason,
        "rule": outcome.rule,
        "sha256": outcome.sha256,
        "size_bytes": outcome.size_bytes,
        "received_at": outcome.received_at.isoformat() if outcome.received_at else None,
        "rows_written": outcome.rows_written,
        "rows": {t: c.to_dict() for t, c in outcome.rows.items()} if not outcome.recovered else None,
        "n_revisions": outcome.n_revisions,
        "revisions": list(outcome.revision_details),
        "n_warnings": outcome.n_warnings,
        "warnings": warnings,
        "duplicate_of": outcome.duplicate_of,
        "data_version": outcome.data_version,
        "recovered": outcome.recovered,
        "written_at": datetime.now().isoformat(timespec="seconds"),
    }
    if outcome.outcome == "duplicate":
        out["message"] = (f"identical to drop {outcome.duplicate_of} (same sha256), which is already "
                          "applied; nothing was written")
    return out


def _write_receipt(receipt: Path, outcome: Outcome, raw_warnings: list | None) -> None:
    tmp = receipt.with_name(f".{receipt.name}.{os.getpid()}.{time.monotonic_ns()}.tmp")
    tmp.write_text(json.dumps(receipt_dict(outcome, raw_warnings), indent=2, default=str) + "\n", "utf-8")
    os.replace(tmp, receipt)
