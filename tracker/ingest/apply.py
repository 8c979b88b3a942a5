"""Applying one drop file to the store: one short connection, one transaction.

Inside that transaction, in this order: the file's sha256 is looked up (a file
identical to one already applied is recorded as 'duplicate' and nothing else is
written); the stored declarations, the reference sds and the stored dates of monthly
series are read; the staged rows are validated (:mod:`tracker.ingest.validate`); then
either the rejection alone is recorded, or everything is written:

* new declarations (identical re-declarations are no-ops);
* for each returns table, the staged rows are compared with the stored values at the
  same keys: new keys are inserted; a changed value is a *revision* -- the old value
  goes to ``revisions`` (series_kind 'factor', 'asset' or 'risk_free'; series_id the
  factor/asset id or the risk-free frequency) and the row is updated; an identical
  value is left alone (re-sending rows is a no-op). Values compare exactly: the same
  text always decodes to the same double;
* one ``drop_files`` row (outcome, reason, rows written per table in ``rows_json``,
  ``n_revisions``, ``warnings_json``, ``claim_token``);
* the change markers in ``store_meta``: ``drops_version`` goes up by one for every
  recorded outcome, ``data_version`` for every outcome that changed a row or a
  declaration. A reader polls them cheaply (``SELECT value FROM store_meta WHERE key
  = 'data_version'``) and reloads only when they move.

An exception anywhere rolls the whole transaction back: a file is never half-applied.
All data goes in through registered Arrow tables and bound parameters.
"""

from __future__ import annotations

import hashlib
import json
from dataclasses import dataclass
from datetime import date, datetime

import numpy as np
import pandas as pd
import pyarrow as pa

from tracker.config import Config
from tracker.ingest.dropformat import DECLARATION_TABLES, RETURN_TABLES, TABLES
from tracker.ingest.outcome import DropWarning, Outcome, Rejection, SeriesChange, TableCounts
from tracker.ingest.sandbox import Rejected, Staged, parse_drop
from tracker.ingest.validate import (
    TRAILING_ROWS,
    Checked,
    DeclarationPlan,
    Invalid,
    ReturnRows,
    check_declarations,
    check_returns,
)
from tracker.store.connection import Store
from tracker.store.sqlfiles import sql

MAX_REVISION_DETAILS = 100
DATA_VERSION = "data_version"
DROPS_VERSION = "drops_version"
_STORE_VALUE = {"factor_returns": "ret", "asset_returns": "ret", "risk_free": "rate"}


@dataclass(frozen=True)
class DropMeta:
    """Facts about a claimed file recorded with its outcome."""

    file_name: str
    claim_token: str                 # the random part of the processing/ name
    size_bytes: int
    sha256: str
    received_at: datetime


def first_row(result) -> tuple | None:
    """The first row of a result, consuming it (DuckDB refuses new work on a half-read result)."""
    rows = result.fetchall()
    return rows[0] if rows else None


def sha256_of(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def sandbox_time_limit(size_bytes: int) -> float:
    """Seconds the sandbox may take: generous for a healthy file, finite for a hostile one."""
    return 60.0 + 4.0 * size_bytes / 1e6


def ingest_bytes(store: Store, config: Config, data: bytes, meta: DropMeta, *,
                 today: date | None = None) -> Outcome:
    """Parse, validate and apply one file's bytes; record the outcome. Never half-applies."""
    today = today or date.today()
    with store.connect() as con:
        dup = first_row(con.execute(sql("ingest.applied_by_sha"), [meta.sha256]))
    if dup is not None:
        # drop_files rows are never deleted, so an applied sha256 stays applied.
        with store.transaction() as con:
            return _record_duplicate(con, meta, int(dup[0]))
    try:
        staged = parse_drop(data, time_limit_s=sandbox_time_limit(meta.size_bytes))
    except Rejected as exc:
        return record_rejection(store, meta, exc.rejection)
    with store.transaction() as con:
        # Checked again inside the transaction: another process may have applied an
        # identical file while this one was being read.
        dup = first_row(con.execute(sql("ingest.applied_by_sha"), [meta.sha256]))
        if dup is not None:
            return _record_duplicate(con, meta, int(dup[0]))
        try:
            plan, checked = _validate(con, staged, config, today)
        except Invalid as exc:
            return _record(con, meta, "rejected", rejection=exc.rejection)
        return _write(con, meta, staged, plan, checked)


def record_rejection(store: Store, meta: DropMeta, rejection: Rejection) -> Outcome:
    """Record a file rejected before its rows were read (size, encoding, format)."""
    with store.transaction() as con:
        return _record(con, meta, "rejected", rejection=rejection)


def _record_duplicate(con, meta: DropMeta, original: int) -> Outcome:
    return _record(con, meta, "duplicate", duplicate_of=original)


def _next_id(con) -> int:
    return int(first_row(con.execute(sql("ingest.next_drop_id")))[0])


def _bump(con, key: str) -> int:
    return int(first_row(con.execute(sql("ingest.bump_meta_counter"), [key]))[0])


def _current(con, key: str) -> int:
    row = first_row(con.execute(sql("ingest.get_meta_counter"), [key]))
    return int(row[0]) if row else 0


def _record(con, meta: DropMeta, outcome: str, *, rejection: Rejection | None = None,
            duplicate_of: int | None = None, drop_id: int | None = None,
            rows: dict[str, TableCounts] | None = None, n_revisions: int = 0,
            warnings: tuple[DropWarning, ...] = (), n_warnings: int = 0, changed: bool = False,
            **extra) -> Outcome:
    drop_id = drop_id if drop_id is not None else _next_id(con)
    rows = rows or {}
    if rejection is not None:
        reason = rejection.reason
    elif duplicate_of is not None:
        reason = f"identical (same sha256) to drop {duplicate_of}, already applied"
    else:
        reason = None
    warnings_json = [w.to_dict() for w in warnings]
    if n_warnings > len(warnings):
        warnings_json.append({"code": "more_warnings", "count": n_warnings - len(warnings),
                              "message": f"{n_warnings - len(warnings)} more warning(s) not listed"})
    con.execute(sql("ingest.insert_drop_file"), [
        drop_id, meta.sha256, meta.file_name, meta.size_bytes, outcome, reason,
        json.dumps({t: c.written for t, c in rows.items()}), n_revisions,
        json.dumps(warnings_json), meta.received_at, meta.claim_token,
    ]).fetchall()
    _bump(con, DROPS_VERSION)
    version = _bump(con, DATA_VERSION) if changed else _current(con, DATA_VERSION)
    return Outcome(
        outcome=outcome, file_name=meta.file_name, drop_id=drop_id, sha256=meta.sha256,
        size_bytes=meta.size_bytes, received_at=meta.received_at, reason=reason,
        rule=rejection.rule if rejection else None, rows=rows, n_revisions=n_revisions,
        warnings=warnings, n_warnings=n_warnings, duplicate_of=duplicate_of, data_version=version,
        **extra,
    )


def _validate(con, staged: Staged, config: Config, today: date) -> tuple[DeclarationPlan, Checked]:
    stored = {
        "factors": con.execute(sql("ingest.declared_factors")).df().set_index("factor_id"),
        "assets": con.execute(sql("ingest.declared_assets")).df().set_index("asset_id"),
    }
    plan = check_declarations(staged, stored)
    trailing: dict[str, pd.DataFrame] = {}
    months: dict[str, pd.DataFrame] = {}
    for name, kind in (("factor_returns", "factor"), ("asset_returns", "asset"), ("risk_free", "risk_free")):
        st = staged.tables.get(name)
        if st is None or not len(st):
            continue
        ids = st.values[TABLES[name].id_column].copy()
        if name == "risk_free":
            ids[st.null["frequency"]] = "daily"
        codes, uniq = pd.factorize(ids)
        if name != "risk_free":
            trailing[name] = _trailing_sd(con, kind, list(uniq))
            freq = plan.series[name].frequency
            monthly_u = np.array([freq.get(x) == "monthly" for x in uniq], dtype=bool)
        else:
            monthly_u = np.array([x == "monthly" for x in uniq], dtype=bool)
        monthly = (codes >= 0) & monthly_u[np.maximum(codes, 0)] if len(uniq) else np.zeros(len(ids), bool)
        if monthly.any():
            d = st.values["date"][monthly]
            pairs = pd.DataFrame({"id": ids[monthly], "month": d.astype("datetime64[M]")}).dropna()
            pairs = pairs.drop_duplicates()
            _register(con, pa.table({
                "id": pa.array(pairs["id"].tolist(), pa.string()),
                "month": pa.array(pairs["month"].to_numpy().astype("datetime64[D]"), pa.date32()),
            }))
            months[name] = con.execute(sql(f"ingest.stored_months_{kind}")).df()
            con.unregister("incoming_frame")
    checked = check_returns(staged, plan, trailing, months, config.ingest, today)
    return plan, checked


# Calendar days before the latest stored date that hold TRAILING_ROWS rows of a daily
# series with room for holidays and short gaps (63 business days span about 91).
TRAILING_WINDOW_DAYS = 130


def _trailing_sd(con, kind: str, ids: list[str]) -> pd.DataFrame:
    """Sd and count of the last TRAILING_ROWS stored returns of each id (index ``id``).

    The recent window answers every series with that many rows inside it (its last
    TRAILING_ROWS rows are then the window's last ones, so the result is exact); the
    others (monthly, short or stale series) are looked up over their whole history. A
    daily drop so costs a scan of the date column, not a window over every history.
    """
    _register(con, pa.table({"id": pa.array(ids, pa.string())}))
    try:
        recent = con.execute(sql(f"ingest.trailing_{kind}_sd_recent"),
                             [TRAILING_WINDOW_DAYS, TRAILING_ROWS]).df().set_index("id")
    finally:
        con.unregister("incoming_frame")
    full = recent.index[recent["n"] >= TRAILING_ROWS]
    answered = set(full)
    rest = [i for i in ids if i not in answered]
    if not rest:
        return recent.loc[full]
    _register(con, pa.table({"id": pa.array(rest, pa.string())}))
    try:
        exact = con.execute(sql(f"ingest.trailing_{kind}_sd"), [TRAILING_ROWS]).df().set_index("id")
    finally:
        con.unregister("incoming_frame")
    return pd.concat([recent.loc[full], exact])


def _register(con, table: pa.Table) -> None:
    con.register("incoming_frame", table)


def _dates(a: np.ndarray) -> pa.Array:
    a = np.asarray(a, dtype="datetime64[D]")
    return pa.array(a, pa.date32(), mask=np.isnat(a))


def _write(con, meta: DropMeta, staged: Staged, plan: DeclarationPlan, checked: Checked) -> Outcome:
    drop_id = _next_id(con)
    rows: dict[str, TableCounts] = {}
    declared: list[str] = []
    for name in DECLARATION_TABLES:
        n_file = plan.n_in_file.get(name, 0)
        fresh = plan.new.get(name)
        n_new = 0 if fresh is None else len(fresh)
        if n_new:
            _register(con, _declaration_arrow(name, fresh))
            con.execute(sql(f"ingest.insert_{name}"), [drop_id]).fetchall()
            con.unregister("incoming_frame")
            declared.extend(f"{name[:-1]}:{x}" for x in fresh[TABLES[name].id_column])
        rows[name] = TableCounts(in_file=n_file, inserted=n_new, unchanged=n_file - n_new)
    changes: list[SeriesChange] = []
    revision_details: list[dict] = []
    n_revisions = 0
    for name in RETURN_TABLES:
        rr = checked.returns.get(name)
        if rr is None or not len(rr):
            rows[name] = TableCounts()
            continue
        counts, table_changes, details = _merge_returns(con, rr, drop_id)
        rows[name] = counts
        n_revisions += counts.revised
        changes.extend(table_changes)
        revision_details.extend(details)
    changed = bool(declared) or any(c.written for c in rows.values())
    return _record(
        con, meta, "applied", drop_id=drop_id, rows=rows, n_revisions=n_revisions,
        warnings=tuple(checked.warnings), n_warnings=checked.n_warnings, changed=changed,
        changes=tuple(changes), declared=tuple(declared),
        revision_details=tuple(revision_details[:MAX_REVISION_DETAILS]),
    )


def _declaration_arrow(name: str, frame: pd.DataFrame) -> pa.Table:
    cols = {}
    for col in TABLES[name].columns:
        s = frame[col.name]
        if col.sql_type == "DATE":
            cols[col.name] = _dates(s.to_numpy(dtype="datetime64[D]"))
        elif col.sql_type == "BOOLEAN":
            cols[col.name] = pa.array(s.astype(bool).tolist(), pa.bool_())
        else:
            cols[col.name] = pa.array(s.tolist(), pa.string())
    return pa.table(cols)


def _merge_returns(con, rr: ReturnRows, drop_id: int) -> tuple[TableCounts, list[SeriesChange], list[dict]]:
    name = rr.table.name
    n = len(rr)
    ids = pa.array(rr.id, pa.string())
    dates = _dates(rr.date)
    _register(con, pa.table({"i": pa.array(np.arange(n, dtype=np.int64)), "id": ids, "date": dates}))
    found = con.execute(sql(f"ingest.existing_{name}")).fetchnumpy()
    con.unregister("incoming_frame")
    old = np.full(n, np.nan)
    has_old = np.zeros(n, dtype=bool)
    at = np.asarray(found["i"], dtype=np.int64)
    old[at] = np.asarray(found["old"], dtype=float)
    has_old[at] = True
    inserted = ~has_old
    revised = has_old & (old != rr.value)
    value = pa.array(rr.value, pa.float64())
    if inserted.any():
        idx = np.flatnonzero(inserted)
        _register(con, pa.table({"id": ids.take(idx), "date": dates.take(idx), "value": value.take(idx)}))
        con.execute(sql(f"ingest.insert_{name}"), [drop_id]).fetchall()
        con.unregister("incoming_frame")
    details: list[dict] = []
    if revised.any():
        idx = np.flatnonzero(revised)
        _register(con, pa.table({"id": ids.take(idx), "date": dates.take(idx),
                                 "old": pa.array(old[idx], pa.float64()), "value": value.take(idx)}))
        con.execute(sql("ingest.insert_revisions"), [rr.table.series_kind, drop_id]).fetchall()
        con.execute(sql(f"ingest.revise_{name}"), [drop_id]).fetchall()
        con.unregister("incoming_frame")
        for i in idx[:MAX_REVISION_DETAILS]:
            details.append({"table": name, "series_id": rr.id[i], "date": str(rr.date[i]),
                            "old": float(old[i]), "new": float(rr.value[i])})
    counts = TableCounts(in_file=n, inserted=int(inserted.sum()), revised=int(revised.sum()),
                         unchanged=int((has_old & ~revised).sum()))
    return counts, _series_changes(rr, inserted, revised), details


def _series_changes(rr: ReturnRows, inserted: np.ndarray, revised: np.ndarray) -> list[SeriesChange]:
    written = inserted | revised
    if not written.any():
        return []
    codes, uniq = pd.factorize(rr.id[written])
    days = rr.date[written].view("int64")
    k = len(uniq)
    big = np.iinfo(np.int64).max
    first = np.full(k, big)
    last = np.full(k, -big)
    first_rev = np.full(k, big)
    np.minimum.at(first, codes, days)
    np.maximum.at(last, codes, days)
    rev = revised[written]
    np.minimum.at(first_rev, codes[rev], days[rev])
    n_ins = np.bincount(codes, weights=inserted[written], minlength=k)
    n_rev = np.bincount(codes, weights=rev, minlength=k)

    def day(x: int) -> date:
        return np.datetime64(int(x), "D").astype(object)

    order = np.argsort(np.asarray(uniq, dtype=object).astype(str))
    return [
        SeriesChange(series_kind=rr.table.series_kind, series_id=str(uniq[j]), n_inserted=int(n_ins[j]),
                     n_revised=int(n_rev[j]), first_date=day(first[j]), last_date=day(last[j]),
                     first_revised=None if first_rev[j] == big else day(first_rev[j]))
        for j in order
    ]
