"""The latest-date warnings of an estimation run, and the history summaries kept for the next.

Split from :mod:`tracker.service.estimate`: for each plan, :func:`prepare_latest` decides
how its latest-date warnings are evaluated -- from the stored history summary extended
with this run's rows (an advance: O(new rows)), or from whole-history arrays (fits,
re-derivations, and advances whose stored summary is missing, the fallback) -- and what
summary is stored for the next run. :func:`set_context` takes the set-level mean tests
once per run, before any model runs; :func:`prepare_writes` turns plans and their outputs
into what the statements store (warning rows, estimate columns, filter states), touching
no store, so a split advance runs it in worker processes.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from tracker.estimation import warning_rules as wr
from tracker.service.estimate_io import (
    BOOK_KEY,
    Book,
    Inputs,
    premium_columns,
    regime_columns,
    stored_history,
)
from tracker.service.factor_models import (
    HINDSIGHT_ROWS,
    MODEL_PREMIUM,
    MODEL_REGIMES,
    PERIODS_PER_YEAR,
    STATE_Q_DOUBLE,
    STATE_Q_HALF,
    STATE_TAIL,
    FactorOutput,
    dumps,
    latest_extras_full,
)
from tracker.service.factor_warnings import (
    LatestContext,
    batch_misfit_diagnostics,
    latest_warnings,
    latest_warnings_from_summary,
    per_date_warnings,
    significance_of,
)
from tracker.service.history_summary import (
    HistorySummary,
    SummaryHead,
    head_from_state,
    mean_test_with,
    sizes_for,
    summary_from_state,
    summary_of,
)

HISTORY_KEY = "history"           # the history summary's key in the premium filter state


def thresholds(config) -> wr.WarningThresholds:
    return config.warnings or wr.WarningThresholds()


def prior_summary(inp: Inputs, fid: str, sizes: dict | None) -> HistorySummary | None:
    """The stored summary of a factor when it describes exactly the stored rows up to its state."""
    return _stored(inp, fid, sizes, "_summaries", summary_from_state)


def prior_head(inp: Inputs, fid: str, sizes: dict | None) -> SummaryHead | None:
    """:func:`prior_summary`'s row count and returns' sums, without parsing the rest
    (that happens where the factor is advanced; see :func:`head_from_state`)."""
    return _stored(inp, fid, sizes, "_heads", head_from_state)


def _stored(inp: Inputs, fid: str, sizes: dict | None, cache_key: str, reader):
    """``reader`` of the factor's stored summary, parsed once per run, when its row count
    is the stored rows' up to the state."""
    cache = inp.__dict__.setdefault(cache_key, {})
    if fid not in cache:
        state = inp.states.get((fid, MODEL_PREMIUM))
        cache[fid] = reader(state["state"] if state else None, sizes, inp.freq[fid])
    found = cache[fid]
    row = inp.rows.get(fid)
    if found is None or row is None or found.n_rows != row.n_before:
        return None
    return found


def current_summary(inp: Inputs, fid: str, sizes: dict | None) -> HistorySummary | None:
    """The stored summary of a factor that this run does not touch, if it is still exact."""
    summary = prior_summary(inp, fid, sizes)
    row = inp.rows[fid]
    if (summary is None or fid in inp.revisions or summary.n_rows != row.n_rows
            or summary.returns.n != row.n_finite
            or summary.last_date != (None if row.last_finite is None else str(row.last_finite))):
        return None
    return summary


def has_extras(state: dict | None) -> bool:
    return bool(state) and all(state["state"].get(k) for k in (STATE_Q_HALF, STATE_Q_DOUBLE, STATE_TAIL))


def emit_mask(out: FactorOutput, plan) -> np.ndarray:
    if plan.emit_from is None:
        return np.zeros(out.dates.size, dtype=bool)
    return (out.dates >= plan.emit_from) & np.isfinite(out.returns)


def _run_rows(out: FactorOutput, plan, *, as_stored: bool) -> tuple:
    """This run's rows from ``emit_from`` on, as evaluated or as the store will hold them
    (``as_stored``: NaN where a row is not written)."""
    sel = (np.zeros(out.dates.size, bool) if plan.emit_from is None else out.dates >= plan.emit_from)
    m = emit_mask(out, plan)[sel] if as_stored else np.ones(int(sel.sum()), bool)

    def w(a):
        return np.where(m, a[sel], np.nan)
    reg = None
    if out.regime_filtered is not None:
        reg = np.where(m[:, None], out.regime_filtered[sel], np.nan)
    return (out.dates[sel], out.returns[sel], w(out.premium), w(out.premium_var), w(out.std_error),
            w(out.loglik_t), reg)


def _joined(parts: list[tuple]) -> tuple:
    arrays = tuple(np.concatenate([p[i] for p in parts]) for i in range(6))
    regs = [p[6] for p in parts]
    return arrays + (None if any(r is None for r in regs) else np.vstack(regs),)


@dataclass
class _Latest:
    """Per plan: how its latest-date warnings are evaluated, and what is stored after."""

    full: tuple | None = None                  # whole-history arrays (full path)
    view: HistorySummary | None = None         # summary incl. this run's rows (fast path)
    store: HistorySummary | None = None        # summary of the stored rows after the write
    extra_states: dict = field(default_factory=dict)


def prepare_latest(inp: Inputs, plan, out: FactorOutput, sizes: dict | None) -> _Latest:
    fid, fr = plan.factor_id, inp.freq[plan.factor_id]
    k = out.regime_filtered.shape[1] if out.regime_filtered is not None else 0
    res = _Latest()
    stored_new = _run_rows(out, plan, as_stored=True)
    if plan.kind == "advance" and fid not in inp.full:
        prior = prior_summary(inp, fid, sizes)
        if prior is None:        # its head read when the run was planned (prior_head)
            raise RuntimeError(f"the stored history summary of {fid} could not be read")
        if emit_mask(out, plan).all():          # every new row is stored: one summary serves both
            prior.extend(*stored_new)
            res.store = res.view = prior
        else:
            res.store = prior.copy()
            res.store.extend(*stored_new)
            prior.extend(*_run_rows(out, plan, as_stored=False))
            res.view = prior
        return res
    old = stored_history(inp, fid, plan.emit_from, k) if fid in inp.history else None
    if plan.kind == "advance":                 # fallback: stored history + this run's rows
        res.full = _joined([old, _run_rows(out, plan, as_stored=False)])
        if not out.extras:
            _, res.extra_states = latest_extras_full(out.params, res.full[1])
    else:
        res.full = (out.dates, out.returns, out.premium, out.premium_var, out.std_error,
                    out.loglik_t, out.regime_filtered)
    if sizes is not None:
        res.store = summary_of(sizes, fr, *_joined([old, stored_new] if old is not None else [stored_new]))
    return res


@dataclass(frozen=True)
class SetContext:
    """The set-level facts of a run's latest-date warnings, all known before a model runs:
    each tracked factor's mean test over its whole history with this run's rows (they
    depend on the returns alone), their tracked-set adjusted p-values, and the newest
    date of each frequency. Computed once per run, so every chunk of a refit and every
    part of a split advance evaluates its factors against the same set."""

    tests: dict                  # factor_id -> MeanTest
    p_adjusted: dict             # factor_id -> adjusted p-value
    latest_by_freq: dict         # frequency -> newest stored date
    is_new: dict                 # factor_id -> flagged as a new factor


def set_context(config, inp: Inputs, plans) -> SetContext:
    th = thresholds(config)
    sizes = sizes_for(th, HINDSIGHT_ROWS)
    advancing = {p.factor_id: p for p in plans if p.kind == "advance" and p.factor_id not in inp.full}
    tests = {}
    for fid in sorted(inp.rows):
        if fid in inp.full:
            test = significance_of(inp.returns[fid][1])
        elif fid in advancing:
            # as the summary will read once the run's rows are appended (prepare_latest)
            head = prior_head(inp, fid, sizes)
            dates, values = inp.returns.get(fid, (np.empty(0, "datetime64[D]"), np.empty(0)))
            test = None if head is None else mean_test_with(head.returns, values[dates >= advancing[fid].emit_from])
        else:
            summary = current_summary(inp, fid, sizes)
            test = summary.mean_test() if summary is not None else None
        if test is None:
            raise RuntimeError(f"no exact mean test for {fid}: its history summary is missing")
        tests[fid] = test
    ids = list(tests)
    p = np.array([tests[f].p_value for f in ids], dtype=float)
    p_adj = dict(zip(ids, (float(x) for x in wr.tracked_set_adjusted_p(p, th))))
    latest_by_freq: dict[str, np.datetime64] = {}
    for fid, row in inp.rows.items():
        fr = inp.freq.get(fid)
        latest_by_freq[fr] = max(latest_by_freq.get(fr, row.last), row.last)
    is_new = dict(zip(inp.factors["factor_id"], inp.factors["is_new"].astype(bool)))
    return SetContext(tests, p_adj, latest_by_freq, is_new)


@dataclass
class PlanWrite:
    """What one plan stores: the estimate rows, the new filter state and any fits."""

    premium: dict                    # premium_columns of the stored rows
    regimes: dict | None             # regime_columns, None without a regime model
    state_json: str
    fits: tuple


@dataclass
class Writes:
    """A run's results ready for the statements: per plan a :class:`PlanWrite`, and the
    warning rows of all of them (``vintages``: end position in ``rows`` and vintage, per
    plan). Parts evaluated apart (a split advance, a refit's chunks) are joined with
    :meth:`join`."""

    plans: dict = field(default_factory=dict)        # factor_id -> PlanWrite
    rows: list = field(default_factory=list)
    vintages: list = field(default_factory=list)

    def join(self, other: Writes) -> None:
        base = len(self.rows)
        self.plans.update(other.plans)
        self.rows.extend(other.rows)
        self.vintages.extend((base + end, v) for end, v in other.vintages)

    def warning_frame(self):
        return _frame_of(self.rows, self.vintages)


def prepare_writes(config, inp: Inputs, plans, outputs, sctx: SetContext) -> Writes:
    """Every plan's latest-date and per-date warnings, estimate columns and new filter
    state, from its output; no store is touched (a split advance runs this in workers)."""
    th = thresholds(config)
    sizes = sizes_for(th, HINDSIGHT_ROWS)
    plans = [p for p in plans if p.factor_id in outputs]
    prepared = {p.factor_id: prepare_latest(inp, p, outputs[p.factor_id], sizes) for p in plans}
    fast = {f: prep.view.errors for f, prep in prepared.items() if prep.view is not None}
    diags = batch_misfit_diagnostics(fast, th)
    res = Writes()
    for plan in plans:
        fid = plan.factor_id
        out, prep = outputs[fid], prepared[fid]
        m = emit_mask(out, plan)
        codes = None
        if m.any():
            found = _plan_warning_rows(inp, plan, out, prep, m, th, sctx, diags.get(fid))
            codes = _codes_at(found, out.dates[m].max())
            res.rows.extend(found)
            res.vintages.append((len(res.rows), plan.vintage))
        book = _book(inp, plan, out, codes)
        ppy = PERIODS_PER_YEAR[inp.freq[fid]]
        regimes = None
        if out.regime_filtered is not None:
            regimes = regime_columns(out.dates[m], out.regime_filtered[m], out.regime_predicted[m])
        res.plans[fid] = PlanWrite(premium_columns(out, m, ppy), regimes,
                                   _state_json(inp, plan, out, prep, book), tuple(out.fits))
    return res


def _codes_at(rows: list[dict], day) -> set:
    """The codes of ``rows`` dated ``day``. The rows are in date order (each date's
    per-date rows, then the last date's latest-date rules), so the scan goes back from the
    end and stops before ``day`` (a refit has ~15,000 rows a factor; only the last few are
    read)."""
    day = np.datetime64(day, "D")
    codes = set()
    for r in reversed(rows):
        d = np.datetime64(r["date"], "D")
        if d < day:
            break
        if d == day:
            codes.add(r["code"])
    return codes


def _plan_warning_rows(inp: Inputs, plan, out: FactorOutput, prep: _Latest, m: np.ndarray,
                       th: wr.WarningThresholds, sctx: SetContext, diag) -> list[dict]:
    """The warning rows one plan stores: per date, and at its last date the latest-date rules."""
    fid, fr = plan.factor_id, inp.freq[plan.factor_id]
    first = int(np.argmax(m))
    n_prior = 0 if plan.kind != "advance" else inp.rows[fid].n_before
    found = (list(out.dated_warnings) if out.dated_warnings is not None and n_prior == 0
             # the last date gets the latest-date rules instead, so it is skipped here
             else per_date_warnings(out, fr, first, n_prior, th, end_index=out.dates.size - 1))
    status = {**_fit_statuses(inp, fid), **out.status}
    msg = {**_fit_messages(inp, fid), **out.message}
    test = sctx.tests[fid]
    ctx = LatestContext(
        frequency=fr, is_new=bool(sctx.is_new[fid]),
        t_stat=test.t_stat, p_value=test.p_value, p_adjusted=float(sctx.p_adjusted[fid]),
        latest_date_in_set=sctx.latest_by_freq[fr],
        revision_count=int(inp.recent_revisions.get(fid, 0)),
        fit_status=status.get(MODEL_PREMIUM, "failed"), fit_message=msg.get(MODEL_PREMIUM, ""),
        regime_status=status.get(MODEL_REGIMES, "failed"), regime_message=msg.get(MODEL_REGIMES, ""),
    )
    if prep.view is not None:
        last_rows = latest_warnings_from_summary(out, ctx, th, prep.view, diag)
    else:
        last_rows = latest_warnings(out, ctx, th, *prep.full)
    last_date = out.dates[-1]
    # per-date rows come in date order (per_date_warnings): the last date's are at the end
    while found and found[-1]["date"] == last_date:
        found.pop()
    return found + last_rows


def _book(inp: Inputs, plan, out: FactorOutput, latest: set | None) -> Book:
    """The row book stored with a factor's new premium state (see :class:`Book`);
    ``latest``: the warning codes at its newest date stored in this run (None: none stored)."""
    row = inp.rows[plan.factor_id]
    refitted = any(rec.model == MODEL_PREMIUM for rec in out.fits)
    if latest is None and plan.kind != "rederive":   # nothing stored at a new date: the codes stand
        old = inp.books.get((plan.factor_id, MODEL_PREMIUM))
        latest = old.codes if old is not None else None
    # a re-derivation that stored no rows superseded the latest ones: None, so the next
    # run reads the codes in force from the store
    return Book(through=str(row.last), drop_seen=int(inp.drop_seen), vintage=int(plan.vintage),
                n_rows=row.n_rows, n_finite=row.n_finite, first=str(row.first),
                last_finite=None if row.last_finite is None else str(row.last_finite),
                since_fit=0 if refitted else row.since_fit,
                codes=None if latest is None else tuple(sorted(latest)))


def _state_json(inp: Inputs, plan, out: FactorOutput, prep: _Latest | None, book: Book) -> str:
    states = {**out.states, **(prep.extra_states if prep else {})}
    states.pop(HISTORY_KEY, None)
    states[BOOK_KEY] = book.to_dict()
    summary = prep.store if prep is not None else None
    if summary is None and plan.emit_from is None:
        old = inp.states.get((plan.factor_id, MODEL_PREMIUM))
        if old and old["state"].get(HISTORY_KEY):
            states[HISTORY_KEY] = old["state"][HISTORY_KEY]    # nothing stored: unchanged
    if summary is not None:
        states[HISTORY_KEY] = summary.to_dict()
    return dumps(states)


def _frame_of(rows: list[dict], vintages: list[tuple[int, int]]):
    """The warnings as an Arrow table, built column by column (a refit stores ~50 rows a
    factor-year; pandas' per-value string conversion cost more than the rules).

    ``vintages``: (end position in ``rows``, vintage) per plan, in order.
    """
    import pyarrow as pa

    if not rows:
        return None
    ends = np.array([e for e, _ in vintages])
    counts = np.diff(np.concatenate(([0], ends)))
    # columns with few distinct values go in as dictionary arrays (a value per distinct
    # code or factor, not per row); only the detail text is converted row by row
    data = {"detail": pa.array([r["detail"] for r in rows], type=pa.string())}
    for keys in (("subject_id",), ("code", "severity", "message", "source")):
        which, uniq = pd.factorize(np.array([r[keys[0]] for r in rows], dtype=object))
        first = np.unique(which, return_index=True)[1]
        for k in keys:
            values = pa.array([rows[i][k] for i in first], type=pa.string())
            data[k] = pa.DictionaryArray.from_arrays(pa.array(which.astype(np.int32)), values)
    data["date"] = pa.array(np.array([r["date"] for r in rows], dtype="datetime64[D]"))
    for k in ("value", "threshold"):
        data[k] = pa.array(np.array([r[k] for r in rows], dtype=float), from_pandas=True)
    data["vintage"] = pa.array(np.repeat([v for _, v in vintages], counts).astype(np.int64))
    return pa.table(data)


def _fits_of(inp: Inputs, fid: str) -> dict:
    idx = getattr(inp, "_fits_by_subject", None)
    if idx is None:
        idx = {}
        for (subject, model), rec in inp.fits.items():
            idx.setdefault(subject, {})[model] = rec
        inp._fits_by_subject = idx
    return idx.get(fid, {})


def _fit_statuses(inp: Inputs, fid: str) -> dict:
    return {m: r["status"] for m, r in _fits_of(inp, fid).items()}


def _fit_messages(inp: Inputs, fid: str) -> dict:
    return {m: r["message"] for m, r in _fits_of(inp, fid).items()}
