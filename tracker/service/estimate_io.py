"""Reading the estimation inputs and writing the results, in as few statements as possible.

Reads (one short connection): small tables in full, and per factor a row summary
(counts and dates, from one aggregate) instead of its whole history. Returns are read
whole only where a model is fitted, a history re-derived, or a stored summary is missing
(:func:`read_returns`); an advance reads only the rows after each filter state. Writes:
one frame per table for all factors (premium and regime estimates, warnings, filter
states, runs), so a day's update of hundreds of factors is a handful of statements.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import date, datetime, timedelta

import numpy as np
import pandas as pd

from tracker.service.factor_models import loads
from tracker.store.sqlfiles import sql


@dataclass(frozen=True)
class RowInfo:
    """Counts and dates of one factor's stored returns."""

    n_rows: int
    n_finite: int
    first: np.datetime64
    last: np.datetime64
    last_finite: np.datetime64 | None
    n_before: int            # rows up to the premium filter state's date (all rows without a state)
    since_fit: int           # rows after the current premium fit's data (0 without a state)


@dataclass
class Inputs:
    read_at: datetime
    factors: pd.DataFrame
    rows: dict                         # factor_id -> RowInfo
    fits: dict                         # (subject, model) -> dict row
    states: dict                       # (subject, model) -> dict row, with "state" parsed
    vintages: dict
    revisions: dict                    # factor_id -> first revised date
    recent_revisions: dict
    latest_codes: dict
    stamps: dict
    returns: dict = field(default_factory=dict)   # factor_id -> (dates, values), see `full`
    full: set = field(default_factory=set)        # factors whose whole history is in `returns`
    history: dict = field(default_factory=dict)   # factor_id -> (premium df, regime df), stored
    market: object = None                         # market_mod.MarketInput
    freq: dict = field(default_factory=dict)      # factor_id -> frequency
    drop_seen: int = 0                            # newest drop id when read (books record it)
    books: dict = field(default_factory=dict)     # (subject, model) -> Book of its state


def as_day(x) -> np.datetime64 | None:
    """A stored or booked date as datetime64[D]; None for a missing one. A day's update
    converts a few thousand: DuckDB's dates and the books' ISO strings go straight to
    numpy (pandas' Timestamp costs ~8 us a value), anything else through pandas."""
    t = type(x)
    if t is date or (t is str and len(x) == 10):
        return np.datetime64(x, "D")
    if t is np.datetime64:
        return None if np.isnat(x) else x.astype("datetime64[D]")
    return None if x is None or pd.isna(x) else np.datetime64(pd.Timestamp(x).date(), "D")


BOOK_KEY = "book"                 # the row book's key in a filter state


@dataclass(frozen=True)
class Book:
    """What a filter state knew of its subject when it was written (key ``"book"``).

    For a factor: the counts and dates of its stored returns up to the state's date, the
    rows after its premium fit's data, the vintage and the warning codes at its latest
    estimated date, and the newest drop id then applied. A day's update counts only the
    rows since (:func:`read_meta`) instead of aggregating every history again.
    """

    through: str
    drop_seen: int
    vintage: int
    n_rows: int | None = None
    n_finite: int | None = None
    first: str | None = None
    last_finite: str | None = None
    since_fit: int | None = None
    codes: tuple | None = None

    @property
    def has_rows(self) -> bool:
        return None not in (self.n_rows, self.n_finite, self.first, self.since_fit)

    def to_dict(self) -> dict:
        d = dict(self.__dict__)           # its fields (plain values: asdict's deep copy costs more)
        d["codes"] = None if self.codes is None else list(self.codes)
        return d

    @classmethod
    def of_state(cls, row: dict) -> Book | None:
        """The state's book when it belongs to exactly this state (same date), else None."""
        d = row["state"].get(BOOK_KEY) if isinstance(row.get("state"), dict) else None
        if not isinstance(d, dict) or d.get("through") != str(as_day(row["through_date"])):
            return None
        try:
            codes = d.get("codes")
            return cls(str(d["through"]), int(d["drop_seen"]), int(d["vintage"]),
                       _int_or_none(d.get("n_rows")), _int_or_none(d.get("n_finite")),
                       d.get("first"), d.get("last_finite"), _int_or_none(d.get("since_fit")),
                       None if codes is None else tuple(str(c) for c in codes))
        except (KeyError, TypeError, ValueError):
            return None


def _int_or_none(x) -> int | None:
    return None if x is None else int(x)


def read_meta(con, *, verify: bool = False) -> Inputs:
    """The run's metadata; per factor a :class:`RowInfo`.

    A factor whose premium state carries a :class:`Book` gets its counts from the book plus
    the rows since (a scan that skips most of the table); the others, every factor with
    ``verify`` (a refit request), and a factor a drop wrote to on or before its book's date
    (a revision or a late row) are counted over their whole histories. Rows reach the store
    through the ingest (:mod:`tracker.ingest.apply`), which stamps each with its drop id;
    rows written around it are seen by the next ``verify`` run.
    """
    read_at = con.execute("SELECT current_timestamp").fetchone()[0]
    factors = con.execute(sql("estimation.factors")).df()
    cur = con.execute(sql("estimation.current_fits"))
    names = [d[0] for d in cur.description]
    fits = {}
    for values in cur.fetchall():
        rec = dict(zip(names, values))
        fits[(rec["subject_id"], rec["model"])] = rec
    states = {}
    for subject, model, fit_id, through, text in con.execute(sql("estimation.filter_states")).fetchall():
        states[(subject, model)] = {"subject_id": subject, "model": model, "fit_id": fit_id,
                                    "through_date": through, "state_json": text, "state": loads(text)}
    drop_seen = int(con.execute(sql("estimation.drop_seen")).fetchall()[0][0])
    books = {}
    for (subject, model), row in states.items():
        book = Book.of_state(row)
        if book is not None:
            books[(subject, model)] = book
    factor_ids = factors["factor_id"].tolist()
    rows = _row_infos(con, factor_ids, {} if verify else {
        s: b for (s, m), b in books.items() if m == "premium" and b.has_rows})
    vintages: dict = {}
    for (subject, _), book in books.items():
        vintages[subject] = max(vintages.get(subject, 0), book.vintage)
    unknown = [f for f in factor_ids if f not in vintages]
    subjects = [s for s in dict.fromkeys(factor_ids + [s for s, _ in states]) if s not in vintages]
    if unknown or subjects:
        vintages.update(dict(con.execute(sql("estimation.current_vintage_of"), [unknown, subjects]).fetchall()))
    booked = {f: b.codes for f in factor_ids if (b := books.get((f, "premium"))) is not None and b.codes is not None}
    codes = {f: set(c) for f, c in booked.items() if c}
    missing = [f for f in factor_ids if f not in booked]
    if missing:
        codes.update({r[0]: set(r[1]) for r in con.execute(sql("estimation.latest_warning_codes_of"), [missing]).fetchall()})
    revisions = {r[0]: r[1] for r in con.execute(sql("estimation.pending_revisions")).fetchall()}
    since = (read_at - timedelta(days=7)) if read_at is not None else datetime(1970, 1, 1)
    recent = dict(con.execute(sql("estimation.recent_revision_counts"), [since]).fetchall())
    stamps = read_stamps(con)
    inp = Inputs(read_at, factors, rows, fits, states, vintages, revisions, recent, codes, stamps)
    inp.drop_seen, inp.books = drop_seen, books
    return inp


def _row_infos(con, factor_ids: list[str], books: dict) -> dict:
    """RowInfo per factor with rows: from ``books`` plus the rows since, or counted whole."""
    rows = {}
    exact = [f for f in factor_ids if f not in books]
    declared = set(factor_ids)
    if books:
        frame = pd.DataFrame({
            "factor_id": list(books),
            "through_date": pd.to_datetime([b.through for b in books.values()]).date,
            "drop_seen": np.array([b.drop_seen for b in books.values()], dtype=np.int64),
        })
        con.register("incoming_frame", frame)
        try:
            since = {r[0]: r[1:] for r in con.execute(sql("estimation.rows_since_books"), [
                min(frame["through_date"]), int(frame["drop_seen"].min())]).fetchall()}
        finally:
            con.unregister("incoming_frame")
        for fid, b in books.items():
            if fid not in declared:
                continue
            n_after, nf_after, last_after, lastf_after, n_back = since.get(fid, (0, 0, None, None, 0))
            if n_back:
                exact.append(fid)           # a drop revised or filled in rows the book counted
                continue
            last = as_day(last_after) if last_after is not None else as_day(b.through)
            last_finite = as_day(lastf_after) if lastf_after is not None else as_day(b.last_finite)
            rows[fid] = RowInfo(b.n_rows + int(n_after), b.n_finite + int(nf_after), as_day(b.first), last,
                                last_finite, b.n_rows, b.since_fit + int(n_after))
    if exact:
        after = {r[0]: (int(r[1]), int(r[2]))
                 for r in con.execute(sql("estimation.rows_after_state_of"), [exact]).fetchall()}
        for r in con.execute(sql("estimation.row_counts_of"), [exact]).fetchall():
            n_after, since_fit = after.get(r[0], (0, 0))
            rows[r[0]] = RowInfo(int(r[1]), int(r[2]), as_day(r[3]), as_day(r[4]), as_day(r[5]),
                                 int(r[1]) - n_after, since_fit)
    return rows


def _grouped(df: pd.DataFrame) -> dict:
    out = {}
    if df.empty:
        return out
    ids = df["factor_id"].to_numpy()
    dates = df["date"].to_numpy().astype("datetime64[D]")
    vals = df["ret"].to_numpy(dtype=float)
    cuts = np.flatnonzero(ids[1:] != ids[:-1]) + 1
    for a, b in zip(np.r_[0, cuts], np.r_[cuts, ids.size]):
        out[ids[a]] = (dates[a:b], vals[a:b])
    return out


def read_returns(con, inp: Inputs, full_ids: set[str], history_ids: set[str]) -> None:
    """Whole histories for ``full_ids``, rows after the filter state for the others."""
    if full_ids:
        inp.returns.update(_grouped(con.execute(sql("estimation.factor_returns_of"), [sorted(full_ids)]).df()))
        inp.full |= set(full_ids)
    tail = _grouped(con.execute(sql("estimation.factor_returns_after_states")).df())
    for fid, v in tail.items():
        if fid not in inp.full:
            inp.returns[fid] = v
    for fid in sorted(history_ids):
        prem = con.execute(sql("estimation.current_premium_history"), [fid]).df()
        reg = con.execute(sql("estimation.current_regime_history"), [fid]).df()
        inp.history[fid] = (prem, reg)


def stored_history(inp: Inputs, fid: str, before: np.datetime64 | None, k: int):
    """Arrays over the stored rows dated before ``before`` (all rows when None), aligned
    with the factor's returns: dates, returns, premium, premium_var, std_error, loglik_t
    and regime probabilities (T, k) (None when k == 0); NaN where nothing is stored."""
    dates, values = inp.returns[fid]
    keep = np.ones(dates.size, bool) if before is None else dates < before
    dates, values = dates[keep], values[keep]
    prem, reg = inp.history[fid]
    hist = prem.set_index(prem["date"].to_numpy().astype("datetime64[D]")).reindex(dates)
    if k:
        reg_map = {np.datetime64(pd.Timestamp(d).date(), "D"): v for d, v in zip(reg["date"], reg["filtered"])}
        regimes = np.array([reg_map.get(d, [np.nan] * k) for d in dates], dtype=float).reshape(-1, k)
    else:
        regimes = None
    return (dates, values, hist["premium"].to_numpy(float), hist["premium_sd"].to_numpy(float) ** 2,
            hist["std_error"].to_numpy(float), hist["loglik_t"].to_numpy(float), regimes)


# ---------------------------------------------------------------------- writing


def read_stamps(con) -> dict:
    """(subject, model) -> when its filter state was written: a write checks these are
    still what its inputs were read against."""
    return {(r[0], r[1]): r[3] for r in con.execute(sql("estimation.state_stamps")).fetchall()}


def regime_columns(dates, filtered, predicted) -> dict:
    """The regime estimate columns of the rows with complete probabilities (FrameBatch)."""
    ok = np.all(np.isfinite(filtered), axis=1)
    f, p = filtered[ok], predicted[ok]
    return {
        "date": np.asarray(dates)[ok].astype("datetime64[ns]"),
        "n_regimes": np.full(f.shape[0], f.shape[1], dtype=np.int64),
        "regime": np.argmax(f, axis=1).astype(int),
        "probability": np.max(f, axis=1),
        "filtered": f,                     # (n, K): list columns
        "predicted": p,
    }


def premium_columns(out, m: np.ndarray, ppy: int) -> dict:
    sd = np.sqrt(out.premium_var[m])
    prem = out.premium[m]
    return {
        "date": out.dates[m].astype("datetime64[ns]"),
        "premium": prem,
        "premium_sd": sd,
        "premium_ann": prem * ppy,
        "premium_ann_sd": sd * ppy,
        "regime_premium": out.regime_premium[m],
        "regime_premium_sd": np.sqrt(out.regime_premium_var[m]),
        "vol_forecast": out.vol_forecast[m],
        "sharpe_ann": prem / out.vol_forecast[m] * np.sqrt(ppy),
        "snr": out.snr[m],
        "std_error": out.std_error[m],
        "loglik_t": out.loglik_t[m],
    }


class FrameBatch:
    """Rows of many factors for one table, inserted as few frames (``limit`` rows each).

    ``add(const, cols)``: ``const`` holds the values shared by the rows (ids, vintage,
    fit id), ``cols`` aligned 1-D arrays, or 2-D arrays for list columns (one row per
    table row; the rows may differ in width between ``add`` calls). A backfill of long
    histories flushes every ``limit`` rows so its frames stay small; a day's update of
    every factor is one insert. The frame is an Arrow table built from the arrays without
    a Python object per value (a refit writes millions of rows); NaN becomes NULL, as
    DuckDB reads NaN in a pandas float column.
    """

    def __init__(self, con, query: str, limit: int = 400_000) -> None:
        self.con, self.query, self.limit = con, query, limit
        self.parts: list[tuple[dict, dict, int]] = []
        self.pending = 0
        self.written = 0

    def add(self, const: dict, cols: dict) -> None:
        n = len(next(iter(cols.values()))) if cols else 0
        if not n:
            return
        self.parts.append((const, cols, n))
        self.pending += n
        if self.pending >= self.limit:
            self.flush()

    def flush(self) -> None:
        if self.parts:
            self.written += insert_frame(self.con, self.query, self._frame())
        self.parts, self.pending = [], 0

    def table(self):
        """The rows added so far as one Arrow table (None without rows), for a caller that
        inserts it later (a forked part builds its frames; its parent inserts them)."""
        return self._frame() if self.parts else None

    def _frame(self):
        import pyarrow as pa

        first_const, first_cols, _ = self.parts[0]
        idx = pa.array(np.repeat(np.arange(len(self.parts)), [n for _, _, n in self.parts]))
        data = {}
        for key in first_const:
            values = [c[key] for c, _, _ in self.parts]
            if all(v is None or (isinstance(v, (int, np.integer)) and not isinstance(v, bool)) for v in values):
                data[key] = pa.array(values, type=pa.int64()).take(idx)
            else:
                data[key] = pa.array(values).take(idx)
        for key, sample in first_cols.items():
            chunks = [np.asarray(cols[key]) for _, cols, _ in self.parts]
            if np.ndim(sample) == 2:
                data[key] = _list_array(chunks)
            else:
                data[key] = pa.array(np.concatenate(chunks), from_pandas=True)
        return pa.table(data)


def _list_array(chunks: list[np.ndarray]):
    """A LIST column from 2-D float arrays, one list per row (widths may differ by chunk)."""
    import pyarrow as pa

    widths = np.concatenate([np.full(c.shape[0], c.shape[1], dtype=np.int64) for c in chunks])
    offsets = np.concatenate(([0], np.cumsum(widths))).astype(np.int32)
    values = np.concatenate([np.ascontiguousarray(c, dtype=float).ravel() for c in chunks])
    return pa.ListArray.from_arrays(pa.array(offsets), pa.array(values, from_pandas=True))


def insert_frame(con, query: str, frame) -> int:
    if frame is None or not len(frame):
        return 0
    con.register("incoming_frame", frame)
    try:
        con.execute(sql(query))
    finally:
        con.unregister("incoming_frame")
    return len(frame)
