"""The latest-date warnings of an estimation run, and the history summaries kept for the next.

Split from :mod:`tracker.service.estimate`: for each plan, :func:`prepare_latest` decides
how its latest-date warnings are evaluated -- from the stored history summary extended
with this run's rows (an advance: O(new rows)), or from whole-history arrays (fits,
re-derivations, and advances whose stored summary is missing, the fallback) -- and what
summary is stored for the next run; :func:`warning_frames` evaluates the set-level mean
tests and every plan's warnings.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from tracker.estimation import warning_rules as wr
from tracker.service.estimate_io import Inputs, stored_history
from tracker.service.factor_models import (
    HINDSIGHT_ROWS,
    MODEL_PREMIUM,
    MODEL_REGIMES,
    STATE_Q_DOUBLE,
    STATE_Q_HALF,
    STATE_TAIL,
    FactorOutput,
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
from tracker.service.history_summary import HistorySummary, sizes_for, summary_from_state, summary_of

HISTORY_KEY = "history"           # the history summary's key in the premium filter state


def thresholds(config) -> wr.WarningThresholds:
    return config.warnings or wr.WarningThresholds()


def prior_summary(inp: Inputs, fid: str, sizes: dict | None) -> HistorySummary | None:
    """The stored summary of a factor when it describes exactly the stored rows up to its state."""
    cache = inp.__dict__.setdefault("_summaries", {})
    if fid not in cache:                      # parsed once per run
        state = inp.states.get((fid, MODEL_PREMIUM))
        cache[fid] = summary_from_state(state["state"] if state else None, sizes, inp.freq[fid])
    summary = cache[fid]
    row = inp.rows.get(fid)
    if summary is None or row is None or summary.n_rows != row.n_before:
        return None
    return summary


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


def warning_frames(config, inp, plans, outputs):
    th = thresholds(config)
    sizes = sizes_for(th, HINDSIGHT_ROWS)
    meta = inp.factors.set_index("factor_id")
    prepared = {p.factor_id: prepare_latest(inp, p, outputs[p.factor_id], sizes)
                for p in plans if p.factor_id in outputs}
    # significance across the tracked set, each factor's mean test over its whole history
    tests = {}
    whole = inp.__dict__.setdefault("_whole_history_tests", {})   # kept for a run's later chunks
    for fid in sorted(inp.rows):
        prep = prepared.get(fid)
        if fid in inp.full:
            if fid not in whole:
                whole[fid] = significance_of(inp.returns[fid][1])
            tests[fid] = whole[fid]
            continue
        summary = prep.view if prep is not None else current_summary(inp, fid, sizes)
        test = summary.mean_test() if summary is not None else None
        if test is None:
            raise RuntimeError(f"no exact mean test for {fid}: its history summary is missing")
        tests[fid] = test
    ids = list(tests)
    p = np.array([tests[f].p_value for f in ids], dtype=float)
    p_adj = dict(zip(ids, wr.tracked_set_adjusted_p(p, th)))
    latest_by_freq: dict[str, np.datetime64] = {}
    for fid, row in inp.rows.items():
        fr = inp.freq.get(fid)
        latest_by_freq[fr] = max(latest_by_freq.get(fr, row.last), row.last)
    fast = {f: prep.view.errors for f, prep in prepared.items() if prep.view is not None}
    diags = batch_misfit_diagnostics(fast, th)
    rows: list[dict] = []
    vintages: list[tuple[int, int]] = []
    for plan in plans:
        out = outputs.get(plan.factor_id)
        if out is None:
            continue
        fid, fr = plan.factor_id, inp.freq[plan.factor_id]
        m = emit_mask(out, plan)
        if not m.any():
            continue
        first = int(np.argmax(m))
        n_prior = 0 if plan.kind != "advance" else inp.rows[fid].n_before
        found = (list(out.dated_warnings) if out.dated_warnings is not None and n_prior == 0
                 # the last date gets the latest-date rules instead, so it is skipped here
                 else per_date_warnings(out, fr, first, n_prior, th, end_index=out.dates.size - 1))
        status = {**_fit_statuses(inp, fid), **out.status}
        msg = {**_fit_messages(inp, fid), **out.message}
        test = tests[fid]
        ctx = LatestContext(
            frequency=fr, is_new=bool(meta.loc[fid, "is_new"]),
            t_stat=test.t_stat, p_value=test.p_value, p_adjusted=float(p_adj[fid]),
            latest_date_in_set=latest_by_freq[fr],
            revision_count=int(inp.recent_revisions.get(fid, 0)),
            fit_status=status.get(MODEL_PREMIUM, "failed"), fit_message=msg.get(MODEL_PREMIUM, ""),
            regime_status=status.get(MODEL_REGIMES, "failed"), regime_message=msg.get(MODEL_REGIMES, ""),
        )
        prep = prepared[fid]
        if prep.view is not None:
            last_rows = latest_warnings_from_summary(out, ctx, th, prep.view, diags.get(fid))
        else:
            last_rows = latest_warnings(out, ctx, th, *prep.full)
        last_date = out.dates[-1]
        # per-date rows come in date order (per_date_warnings): the last date's are at the end
        while found and found[-1]["date"] == last_date:
            found.pop()
        rows.extend(found)
        rows.extend(last_rows)
        vintages.append((len(rows), plan.vintage))
    return _frame_of(rows, vintages), prepared


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
