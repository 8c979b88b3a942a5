"""Row rules, applied to staged rows before the store is written. Pure numpy/pandas.

Rejections (the whole file is rejected; the first offending row in file order is
named with its statement, line and rule, plus how many other rows break rules):

=================== ==========================================================
rule                when
=================== ==========================================================
missing_value       NULL in a required column
bad_id              an id that is not 1-64 characters of ``A-Z a-z 0-9 _ . -``
                    starting with a letter or digit
bad_label           an empty label, a label over 200 or a description over
                    2000 characters
bad_frequency       a frequency other than 'daily' or 'monthly'
duplicate_key       the same key twice in the file (factor or asset id; series
                    and date; risk-free frequency and date), even with equal values
redeclared          a stored factor or asset declared again with any attribute
                    different (label, description, frequency, is_traded, is_new,
                    start_date); an identical declaration is a no-op
id_clash            a factor and an asset with the same id
unknown_series      returns of a factor or asset declared neither in the store
                    nor in the file
non_finite          NaN or infinite return or rate
implausible_date    a date before 1900-01-01
future_date         a date after today (the local calendar date of the machine)
before_start        a date before the series' start_date
return_floor        a return or rate at or below -1 (-100 %): impossible for a
                    simple return
too_large           abs(value) at or above ``[ingest] reject_abs_return``
=================== ==========================================================

Warnings (the file is applied; each warning is kept in ``drop_files.warnings_json``
and the receipt, the first :data:`MAX_WARNING_DETAILS` with their line):

* ``large_move``: abs(return) above ``[ingest] warn_sigma`` reference standard
  deviations, measured from zero. The reference is the sample sd of the series'
  last 63 stored returns when at least 20 are stored; otherwise the robust sd
  (1.4826 x median absolute deviation from the median) of the file's own rows of
  that series when it has at least 20; otherwise no check. Risk-free rates are
  levels, not shocks, and are not checked this way.
* ``weekend_date``: a daily series dated on a Saturday or Sunday.
* ``not_month_end``: a monthly series dated neither on the last calendar day nor on
  the last weekday (Monday-Friday) of its month.
* ``two_rows_in_month``: a monthly series with more than one distinct date in one
  calendar month, counting the rows already stored.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import date

import numpy as np
import pandas as pd

from tracker.config import IngestSettings
from tracker.ingest.dropformat import (
    DECLARED_IN,
    FREQUENCIES,
    ID_PATTERN,
    MAX_DESCRIPTION,
    MAX_LABEL,
    TABLES,
    DropTable,
)
from tracker.ingest.outcome import DropWarning, Rejection
from tracker.ingest.sandbox import Staged, StagedTable

TRAILING_ROWS = 63          # stored returns behind the reference sd
MIN_REFERENCE_ROWS = 20     # fewer: no reference sd from that source
MAD_TO_SD = 1.4826          # sd of a normal distribution per unit of median absolute deviation
MAX_WARNING_DETAILS = 50
EARLIEST_DATE = np.datetime64("1900-01-01", "D")
_DECL_ATTRS = {
    "factors": ("label", "description", "frequency", "is_traded", "is_new", "start_date"),
    "assets": ("label", "description", "frequency", "start_date"),
}


class Invalid(Exception):
    def __init__(self, rejection: Rejection) -> None:
        super().__init__(rejection.reason)
        self.rejection = rejection


@dataclass
class Series:
    """What is known of the series a file touches: declared frequency and start date."""

    frequency: dict[str, str]                # id -> 'daily' | 'monthly'
    start: dict[str, np.datetime64]          # id -> start_date (NaT: none)


@dataclass
class DeclarationPlan:
    """Declarations of a file: the new ones to insert, and every series they define."""

    new: dict[str, pd.DataFrame]             # 'factors' / 'assets' -> rows to insert
    n_in_file: dict[str, int]
    series: dict[str, Series]                # returns table -> its series' attributes


@dataclass
class ReturnRows:
    """Validated rows of one returns table: key, value and where each came from."""

    table: DropTable
    id: np.ndarray          # object: factor/asset id, or the risk-free frequency
    date: np.ndarray        # datetime64[D]
    value: np.ndarray       # float64
    statement: np.ndarray
    row: np.ndarray

    def __len__(self) -> int:
        return len(self.id)


@dataclass
class Checked:
    returns: dict[str, ReturnRows]
    warnings: list[DropWarning] = field(default_factory=list)
    n_warnings: int = 0


def _first_fault(staged: Staged, faults: list) -> None:
    """Raise for the earliest row (in file order) that any rule flags.

    ``faults`` holds (rule, staged table, boolean mask, message maker(i) -> str).
    """
    best = None
    keys = []
    for rule, st, mask, make in faults:
        idx = np.flatnonzero(mask)
        if not len(idx):
            continue
        row_keys = (st.statement[idx].astype(np.int64) << 40) + st.row[idx]
        keys.append(row_keys)
        j = int(np.argmin(row_keys))
        cand = (int(row_keys[j]), rule, st, int(idx[j]), make)
        if best is None or cand[0] < best[0]:
            best = cand
    if best is None:
        return
    _, rule, st, first, make = best
    message = make(first)
    others = len(np.unique(np.concatenate(keys))) - 1
    if others > 0:
        message += f"; {others} more row(s) break rules"
    statement, row = int(st.statement[first]), int(st.row[first])
    raise Invalid(Rejection(rule, message, statement, staged.line(statement, row)))


def _date_text(d) -> str:
    return str(np.datetime64(d, "D")) if not np.isnat(np.datetime64(d, "D")) else "NULL"


def check_declarations(staged: Staged, stored: dict[str, pd.DataFrame]) -> DeclarationPlan:
    """Validate the file's declarations against the stored ones and resolve every series.

    ``stored[t]`` is the store's ``factors`` / ``assets`` table indexed by id.
    """
    faults: list = []
    new: dict[str, pd.DataFrame] = {}
    n_in_file: dict[str, int] = {}
    file_decl: dict[str, pd.DataFrame] = {}
    for name in ("factors", "assets"):
        st = staged.tables.get(name)
        if st is None or not len(st):
            continue
        t = st.table
        idc = t.id_column
        n_in_file[name] = len(st)
        for col in t.columns:
            if col.required:
                faults.append(("missing_value", st, st.null[col.name],
                               lambda i, c=col.name, tn=name: f"{tn}: {c} is NULL"))
        frame = _declaration_frame(st)
        ids = frame[idc]
        ok_id = ids.map(lambda x: isinstance(x, str) and ID_PATTERN.fullmatch(x) is not None).to_numpy(bool)
        faults.append(("bad_id", st, ~ok_id & ~st.null[idc], lambda i, st=st, idc=idc: (
            f"id {st.values[idc][i]!r} is not valid (1-64 characters of A-Z a-z 0-9 _ . -, "
            "starting with a letter or digit)")))
        labels = frame["label"].fillna("")
        bad_label = (labels.str.strip() == "") | (labels.str.len() > MAX_LABEL) | (
            frame["description"].str.len() > MAX_DESCRIPTION)
        faults.append(("bad_label", st, bad_label.to_numpy(bool) & ~st.null["label"], lambda i, f=frame, idc=idc: (
            f"declaration of {f[idc].iat[i]!r}: the label must be 1-{MAX_LABEL} characters and the "
            f"description at most {MAX_DESCRIPTION}")))
        bad_freq = ~frame["frequency"].isin(FREQUENCIES).to_numpy(bool) & ~st.null["frequency"]
        faults.append(("bad_frequency", st, bad_freq, lambda i, f=frame, idc=idc: (
            f"declaration of {f[idc].iat[i]!r}: frequency {f['frequency'].iat[i]!r} is not one of "
            + ", ".join(FREQUENCIES))))
        dup = ids.duplicated(keep="first").to_numpy(bool) & ~st.null[idc]
        faults.append(("duplicate_key", st, dup, lambda i, f=frame, idc=idc, tn=name: (
            f"{tn}: {f[idc].iat[i]!r} is declared twice in the file")))
        changed = _redeclared(frame, stored[name], name)
        faults.append(("redeclared", st, changed.notna().to_numpy(bool), lambda i, ch=changed: ch.iat[i]))
        file_decl[name] = frame
    # A factor and an asset may not share an id: model results are keyed by subject id.
    for name, other in (("factors", "assets"), ("assets", "factors")):
        if name not in file_decl:
            continue
        frame = file_decl[name]
        idc = TABLES[name].id_column
        taken = set(stored[other].index)
        if other in file_decl:
            taken |= set(file_decl[other][TABLES[other].id_column])
        clash = frame[idc].isin(taken).to_numpy(bool)
        faults.append(("id_clash", staged.tables[name], clash, lambda i, f=frame, idc=idc, o=other: (
            f"id {f[idc].iat[i]!r} is already used by {o}; a factor and an asset may not share an id")))
    _first_fault(staged, faults)
    series: dict[str, Series] = {}
    for table, decl in DECLARED_IN.items():
        freq = dict(zip(stored[decl].index, stored[decl]["frequency"]))
        start = {k: _as_day(v) for k, v in zip(stored[decl].index, stored[decl]["start_date"])}
        if decl in file_decl:
            frame = file_decl[decl]
            idc = TABLES[decl].id_column
            fresh = frame[~frame[idc].isin(stored[decl].index)]
            new[decl] = fresh.reset_index(drop=True)
            freq.update(zip(frame[idc], frame["frequency"]))
            start.update({k: _as_day(v) for k, v in zip(frame[idc], frame["start_date"])})
        series[table] = Series(freq, start)
    return DeclarationPlan(new, n_in_file, series)


def _as_day(v) -> np.datetime64:
    if v is None or (isinstance(v, float) and np.isnan(v)) or v is pd.NaT:
        return np.datetime64("NaT", "D")
    return np.datetime64(pd.Timestamp(v).date(), "D") if not isinstance(v, np.datetime64) else v.astype("datetime64[D]")


def _declaration_frame(st: StagedTable) -> pd.DataFrame:
    """The staged declarations with defaults filled in for omitted or NULL optional columns."""
    data = {}
    for col in st.table.columns:
        v = st.values[col.name]
        if col.sql_type == "DATE":
            s = pd.Series(v.astype("datetime64[s]"), dtype="datetime64[s]")
            s[st.null[col.name]] = pd.NaT
        else:
            s = pd.Series(v, dtype=object)
            if not col.required:
                s[st.null[col.name]] = col.default
        data[col.name] = s
    return pd.DataFrame(data)


def _redeclared(frame: pd.DataFrame, stored: pd.DataFrame, name: str) -> pd.Series:
    """Per file row: None, or the message naming the attributes that differ from the store."""
    idc = TABLES[name].id_column
    out = pd.Series([None] * len(frame), dtype=object)
    known = frame[idc].isin(stored.index).to_numpy(bool)
    for i in np.flatnonzero(known):
        row = frame.iloc[i]
        old = stored.loc[row[idc]]
        diffs = []
        for attr in _DECL_ATTRS[name]:
            a, b = old[attr], row[attr]
            if attr == "start_date":
                a, b = _date_text(_as_day(a)), _date_text(_as_day(b))
            elif attr in ("is_traded", "is_new"):
                a, b = bool(a), bool(b)
            if a != b:
                diffs.append(f"{attr}: stored {a!r}, file {b!r}")
        if diffs:
            kind = name[:-1]
            out.iat[i] = (f"{kind} {row[idc]!r} is already declared with different attributes ("
                          + "; ".join(diffs) + "); declarations cannot be changed by a drop file")
    return out


def check_returns(
    staged: Staged,
    plan: DeclarationPlan,
    trailing: dict[str, pd.DataFrame],
    stored_months: dict[str, pd.DataFrame],
    settings: IngestSettings,
    today: date,
) -> Checked:
    """Validate the returns tables; raise :class:`Invalid` or return rows and warnings.

    ``trailing[t]``: per id (index) the columns ``sd`` and ``n`` of its last
    :data:`TRAILING_ROWS` stored returns. ``stored_months[t]``: stored (``id``, ``date``)
    rows of monthly series in the months the file touches.
    """
    faults: list = []
    rows: dict[str, ReturnRows] = {}
    warn_parts: list[tuple[str, StagedTable, np.ndarray, object, np.ndarray | None]] = []
    today64 = np.datetime64(today, "D")
    for name in ("factor_returns", "asset_returns", "risk_free"):
        st = staged.tables.get(name)
        if st is None or not len(st):
            continue
        t = st.table
        idc, vc = t.id_column, t.value_column
        ids = st.values[idc].copy()
        if name == "risk_free":
            ids[st.null[idc]] = "daily"
        dates = st.values["date"]
        vals = st.values[vc]
        null_any = np.zeros(len(st), dtype=bool)
        for col in t.columns:
            if col.required:
                faults.append(("missing_value", st, st.null[col.name],
                               lambda i, c=col.name, tn=name: f"{tn}: {c} is NULL"))
                null_any |= st.null[col.name]
        codes, uniq = pd.factorize(pd.Series(ids, dtype=object))
        codes = np.asarray(codes)
        uniq = list(uniq)
        label = _series_label(name)

        def who(i, ids=ids, dates=dates, label=label):
            return f"{label} {ids[i]!r} on {_date_text(dates[i])}"

        if name == "risk_free":
            known_u = np.array([u in FREQUENCIES for u in uniq], dtype=bool)
            freq_u = np.array([u if u in FREQUENCIES else "daily" for u in uniq], dtype=object)
            start_u = np.full(len(uniq), np.datetime64("NaT", "D"))
            faults.append(("bad_frequency", st, ~_lookup(known_u, codes, True) & ~null_any,
                           lambda i, ids=ids: f"risk_free frequency {ids[i]!r} is not one of "
                           + ", ".join(FREQUENCIES)))
        else:
            ser = plan.series[name]
            known_u = np.array([u in ser.frequency for u in uniq], dtype=bool)
            freq_u = np.array([ser.frequency.get(u, "daily") for u in uniq], dtype=object)
            start_u = np.array([ser.start.get(u, np.datetime64("NaT", "D")) for u in uniq],
                               dtype="datetime64[D]")
            kind = label
            faults.append(("unknown_series", st, ~_lookup(known_u, codes, True) & ~null_any,
                           lambda i, ids=ids, kind=kind, decl=DECLARED_IN[name]: (
                               f"{kind} {ids[i]!r} is not declared (neither in the store nor in this "
                               f"file); declare it in {decl} first")))
        finite = np.isfinite(vals)
        faults.append(("non_finite", st, ~finite & ~null_any,
                       lambda i, vals=vals, who=who, vc=vc: f"{vc} of {who(i)} is not a finite number ({vals[i]})"))
        faults.append(("implausible_date", st, (dates < EARLIEST_DATE) & ~null_any,
                       lambda i, who=who: f"{who(i)}: dates before 1900-01-01 are not accepted"))
        faults.append(("future_date", st, (dates > today64) & ~null_any,
                       lambda i, who=who: f"{who(i)}: the date is after today ({today.isoformat()})"))
        start_row = start_u[codes] if len(uniq) else np.full(len(st), np.datetime64("NaT", "D"))
        start_row = np.where(codes >= 0, start_row, np.datetime64("NaT", "D"))
        before = ~np.isnat(start_row) & (dates < start_row) & ~null_any
        faults.append(("before_start", st, before, lambda i, who=who, s=start_row: (
            f"{who(i)}: the date is before the series' start_date {_date_text(s[i])}")))
        with np.errstate(invalid="ignore"):
            floor = finite & (vals <= -1.0) & ~null_any
            big = finite & (np.abs(vals) >= settings.reject_abs_return) & ~floor & ~null_any
        faults.append(("return_floor", st, floor, lambda i, who=who, vals=vals, vc=vc: (
            f"{vc} {vals[i]:g} of {who(i)} is at or below -1 (-100 %), impossible for a simple return")))
        faults.append(("too_large", st, big, lambda i, who=who, vals=vals, vc=vc: (
            f"{vc} {vals[i]:g} of {who(i)}: abs value at or above reject_abs_return = "
            f"{settings.reject_abs_return:g} (values are decimals: 0.01 is 1 %)")))
        key = (codes.astype(np.int64) << 32) + (dates.view("int64") + 2**31)
        dup = _later_duplicates(key) & ~null_any
        faults.append(("duplicate_key", st, dup, lambda i, who=who, key=key, st=st: (
            f"{who(i)} appears more than once in the file (first at line "
            f"{_line_of(staged, st, int(np.flatnonzero(key == key[i])[0]))})")))
        rows[name] = ReturnRows(t, ids, dates, vals, st.statement, st.row)
        freq_row = np.where(codes >= 0, freq_u[np.maximum(codes, 0)] if len(uniq) else "daily", "daily")
        warn_parts.extend(_frequency_warnings(name, st, ids, dates, codes, freq_row, stored_months.get(name), who))
        if name != "risk_free":
            warn_parts.extend(_magnitude_warnings(name, st, ids, vals, codes, uniq, trailing.get(name),
                                                  settings.warn_sigma, who, vc))
    _first_fault(staged, faults)
    warnings, n = _collect_warnings(staged, warn_parts)
    return Checked(rows, warnings, n)


def _series_label(table: str) -> str:
    return {"factor_returns": "factor", "asset_returns": "asset", "risk_free": "risk-free"}[table]


def _lookup(per_unique: np.ndarray, codes: np.ndarray, fill) -> np.ndarray:
    if not len(per_unique):
        return np.full(len(codes), fill)
    return np.where(codes >= 0, per_unique[np.maximum(codes, 0)], fill)


def _later_duplicates(key: np.ndarray) -> np.ndarray:
    """True for every row whose key already appeared earlier in the array."""
    order = np.argsort(key, kind="stable")
    sk = key[order]
    later = np.zeros(len(key), dtype=bool)
    later[order[1:]] = sk[1:] == sk[:-1]
    return later


def _line_of(staged: Staged, st: StagedTable, i: int) -> int:
    return staged.line(int(st.statement[i]), int(st.row[i]))


def _frequency_warnings(name, st, ids, dates, codes, freq_row, stored, who):
    out = []
    ok = ~np.isnat(dates)
    weekday = (dates.view("int64") + 3) % 7          # Monday = 0; 1970-01-01 was a Thursday
    daily = (freq_row == "daily") & ok
    weekend = daily & (weekday >= 5)
    out.append(("weekend_date", st, weekend,
                lambda i, who=who: f"{who(i)}: a daily series dated on a weekend", None))
    monthly = (freq_row == "monthly") & ok
    if monthly.any():
        month = dates.astype("datetime64[M]")
        last_day = (month + 1).astype("datetime64[D]") - 1
        last_wd = (last_day.view("int64") + 3) % 7
        last_weekday = last_day - np.where(last_wd == 6, 2, np.where(last_wd == 5, 1, 0))
        off = monthly & (dates != last_day) & (dates != last_weekday)
        out.append(("not_month_end", st, off, lambda i, who=who: (
            f"{who(i)}: a monthly series dated neither on the last day nor the last weekday of its month"),
            None))
        idx = np.flatnonzero(monthly)
        frame = pd.DataFrame({"id": pd.Series(ids[idx], dtype=object), "month": month[idx], "date": dates[idx]})
        if stored is not None and len(stored):
            extra = pd.DataFrame({"id": stored["id"].astype(object),
                                  "month": stored["date"].to_numpy().astype("datetime64[M]"),
                                  "date": stored["date"].to_numpy().astype("datetime64[D]")})
            both = pd.concat([frame, extra], ignore_index=True)
        else:
            both = frame
        counts = both.drop_duplicates().groupby(["id", "month"]).size()
        crowded = frame.set_index(["id", "month"]).index.isin(counts[counts > 1].index)
        mask = np.zeros(len(st), dtype=bool)
        mask[idx[crowded]] = True
        out.append(("two_rows_in_month", st, mask, lambda i, who=who: (
            f"{who(i)}: a monthly series with more than one date in this month"), None))
    return out


def _magnitude_warnings(name, st, ids, vals, codes, uniq, trailing, warn_sigma, who, vc):
    n_u = len(uniq)
    if not n_u:
        return []
    ref = np.full(n_u, np.nan)
    if trailing is not None and len(trailing):
        got = trailing.reindex(uniq)
        usable = (got["n"].fillna(0).to_numpy() >= MIN_REFERENCE_ROWS) & (got["sd"].fillna(0).to_numpy() > 0)
        ref = np.where(usable, got["sd"].to_numpy(dtype=float), np.nan)
    missing = np.isnan(ref)
    if missing.any():
        frame = pd.DataFrame({"c": codes, "v": vals})
        frame = frame[(frame["c"] >= 0) & np.isfinite(frame["v"].to_numpy())]
        frame = frame[np.isin(frame["c"].to_numpy(), np.flatnonzero(missing))]
        if len(frame):
            g = frame.groupby("c")["v"]
            n = g.size()
            med = g.transform("median")
            mad = (frame["v"] - med).abs().groupby(frame["c"]).median() * MAD_TO_SD
            robust = mad[(n >= MIN_REFERENCE_ROWS) & (mad > 0)]
            ref[robust.index.to_numpy()] = robust.to_numpy()
    sd_row = _lookup(ref, codes, np.nan)
    with np.errstate(invalid="ignore"):
        large = np.isfinite(sd_row) & np.isfinite(vals) & (np.abs(vals) > warn_sigma * sd_row)
    return [("large_move", st, large, lambda i, who=who, v=vals, s=sd_row, vc=vc: (
        f"{who(i)}: {vc} {v[i]:.6g} is {abs(v[i]) / s[i]:.1f} reference sds from zero "
        f"(warning above {warn_sigma:g})"), (vals, warn_sigma * sd_row))]


def _collect_warnings(staged: Staged, parts) -> tuple[list[DropWarning], int]:
    """All warnings in file order: the first MAX_WARNING_DETAILS in full, the rest counted."""
    flagged = []
    total = 0
    for code, st, mask, make, numbers in parts:
        idx = np.flatnonzero(mask)
        total += len(idx)
        for i in idx[np.lexsort((st.row[idx], st.statement[idx]))][:MAX_WARNING_DETAILS]:
            flagged.append((int(st.statement[i]), int(st.row[i]), code, st, int(i), make, numbers))
    flagged.sort(key=lambda x: (x[0], x[1], x[2]))
    flagged = flagged[:MAX_WARNING_DETAILS]
    lines = staged.lines([(s, r) for s, r, *_ in flagged])
    out = []
    for (s, r, code, st, i, make, numbers), line in zip(flagged, lines):
        t = st.table
        value = threshold = None
        if numbers is not None:
            value, threshold = float(numbers[0][i]), float(numbers[1][i])
        series = st.values[t.id_column][i] if t.id_column else None
        out.append(DropWarning(code=code, message=make(i), table=t.name,
                               series_id=series if series is not None else "daily",
                               date=_date_text(st.values["date"][i]), value=value, threshold=threshold,
                               statement=s, line=line))
    return out, total
