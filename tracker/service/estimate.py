"""Bringing the stored estimates up to date: fit rarely, filter often, never rewrite the past.

One call, :func:`update`, does whatever the stored data require, per factor:

* ``backfill`` -- no estimates yet: fit on the whole history and store the filtered
  estimate of every date (vintage 1). Parameters then come from the whole sample, which
  the fit record's ``data_through`` makes visible; the *states* are still real-time.
* ``advance`` -- new rows after the saved filter state: filter just those rows at the
  stored parameters, from the saved state (cost proportional to the new rows).
* ``refit`` -- on request, on schedule (``[models] refit_every_days`` new rows since the
  last fit) or after a DRIFT warning: re-estimate warm-started from the previous
  parameters, re-run the filters to the end of the data and store estimates for the new
  dates only; stored past estimates are kept as they were known.
* ``rederive`` -- a revision changed a stored return: refit, mark the stored estimates
  from the revised date on as superseded (kept, ``superseded_at`` set) and write a new
  vintage from that date. The run is recorded in ``estimation_runs``.

Inputs are read on one short connection, the models run with no connection open (in
worker processes for refits), and the results are written in one transaction. A file
lock beside the store keeps two processes from estimating at once; the loser skips, and
the winner's results reach it through the store.
"""

from __future__ import annotations

import dataclasses
import fcntl
import json
import math
import os
from collections.abc import Callable
from contextlib import contextmanager
from dataclasses import dataclass, field
from datetime import datetime, timedelta

import numpy as np
import pandas as pd

from tracker.config import Config
from tracker.estimation import warning_rules as wr
from tracker.service.executor import Executor, SerialExecutor, executor_for
from tracker.service.factor_models import (
    FACTOR_MODELS,
    MODEL_PREMIUM,
    MODEL_REGIMES,
    PERIODS_PER_YEAR,
    FactorOutput,
    FactorTask,
    dumps,
    run_factor,
)
from tracker.service.factor_warnings import (
    LatestContext,
    latest_warnings,
    per_date_warnings,
    significance_of,
)
from tracker.service import market as market_mod
from tracker.store.connection import Store
from tracker.store.sqlfiles import sql

Progress = Callable[[int, int, str], None]


@dataclass(frozen=True)
class Plan:
    factor_id: str
    kind: str                         # backfill, advance, refit, rederive
    reason: str
    emit_from: np.datetime64 | None   # first date to store
    vintage: int


@dataclass
class RunSummary:
    kinds: dict = field(default_factory=dict)   # factor_id -> kind
    rows_written: int = 0
    skipped: str = ""

    def describe(self) -> str:
        if self.skipped:
            return self.skipped
        if not self.kinds:
            return "estimates are up to date"
        by_kind: dict[str, list[str]] = {}
        for f, k in self.kinds.items():
            by_kind.setdefault(k, []).append(f)
        parts = [f"{k} {len(v)}" for k, v in sorted(by_kind.items())]
        return f"estimated {', '.join(parts)}; {self.rows_written} estimate rows written"


@contextmanager
def estimation_lock(store: Store):
    """Non-blocking cross-process lock; yields False when another process holds it."""
    path = store.folder / ".estimation.lock"
    fd = os.open(path, os.O_CREAT | os.O_RDWR, 0o644)
    try:
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            yield False
            return
        try:
            yield True
        finally:
            fcntl.flock(fd, fcntl.LOCK_UN)
    finally:
        os.close(fd)


def _settings(config: Config) -> dict:
    return dataclasses.asdict(config.models)


@dataclass
class _Inputs:
    read_at: datetime
    factors: pd.DataFrame
    returns: dict                      # factor_id -> (dates datetime64[D], values)
    fits: dict                         # (subject, model) -> dict row
    states: dict                       # (subject, model) -> dict row
    vintages: dict
    revisions: dict                    # factor_id -> first revised date
    recent_revisions: dict
    latest_codes: dict
    stamps: dict


def _read_inputs(store: Store) -> _Inputs:
    with store.connect() as con:
        read_at = con.execute("SELECT current_timestamp").fetchone()[0]
        factors = con.execute(sql("estimation.factors")).df()
        rets = con.execute(sql("estimation.factor_returns_all")).df()
        fits = {(r["subject_id"], r["model"]): r for r in con.execute(sql("estimation.current_fits")).df().to_dict("records")}
        states = {(r["subject_id"], r["model"]): r for r in con.execute(sql("estimation.filter_states")).df().to_dict("records")}
        vintages = dict(con.execute(sql("estimation.current_vintage")).fetchall())
        revisions = {r[0]: r[1] for r in con.execute(sql("estimation.pending_revisions")).fetchall()}
        since = (read_at - timedelta(days=7)) if read_at is not None else datetime(1970, 1, 1)
        recent = dict(con.execute(sql("estimation.recent_revision_counts"), [since]).fetchall())
        codes = {r[0]: set(r[1]) for r in con.execute(sql("estimation.latest_warning_codes")).fetchall()}
        stamps = {(r[0], r[1]): r[3] for r in con.execute(sql("estimation.state_stamps")).fetchall()}
    returns = {}
    for fid, g in rets.groupby("factor_id", sort=False):
        returns[fid] = (g["date"].to_numpy().astype("datetime64[D]"), g["ret"].to_numpy(dtype=float))
    return _Inputs(read_at, factors, returns, fits, states, vintages, revisions, recent, codes, stamps)


def _plan(inp: _Inputs, config: Config, refit_request: set[str] | None, only: set[str] | None) -> list[Plan]:
    plans = []
    every = config.models.refit_every_days
    for f in inp.factors.itertuples():
        fid = f.factor_id
        if only is not None and fid not in only:
            continue
        if fid not in inp.returns:
            continue
        dates, _ = inp.returns[fid]
        state = inp.states.get((fid, MODEL_PREMIUM))
        vintage = int(inp.vintages.get(fid, 0))
        requested = refit_request is not None and (not refit_request or fid in refit_request)
        if state is None:
            plans.append(Plan(fid, "backfill", "initial", dates[0], max(vintage, 0) + 1))
            continue
        through = np.datetime64(pd.Timestamp(state["through_date"]).date(), "D")
        n_known = json.loads(state["state_json"]).get(MODEL_PREMIUM, {}).get("n_rows")
        n_before = int(np.sum(dates <= through))
        if fid in inp.revisions:
            first = np.datetime64(pd.Timestamp(inp.revisions[fid]).date(), "D")
            plans.append(Plan(fid, "rederive", "revision", first, vintage + 1))
        elif n_known is not None and n_before != n_known:
            plans.append(Plan(fid, "rederive", "rows inserted before the filter state", dates[0], vintage + 1))
        elif dates[-1] > through:
            fit = inp.fits.get((fid, MODEL_PREMIUM))
            fit_through = through if fit is None or pd.isna(fit["data_through"]) else np.datetime64(pd.Timestamp(fit["data_through"]).date(), "D")
            since_fit = int(np.sum(dates > fit_through))
            if requested:
                plans.append(Plan(fid, "refit", "request", through + 1, vintage))
            elif since_fit >= every:
                plans.append(Plan(fid, "refit", "schedule", through + 1, vintage))
            elif "DRIFT" in inp.latest_codes.get(fid, set()):
                plans.append(Plan(fid, "refit", "drift", through + 1, vintage))
            else:
                plans.append(Plan(fid, "advance", "new rows", through + 1, vintage))
        elif requested:
            plans.append(Plan(fid, "refit", "request", None, vintage))
    return plans


def _params_of(inp: _Inputs, fid: str) -> dict:
    out = {}
    for model in FACTOR_MODELS:
        rec = inp.fits.get((fid, model))
        if rec is not None and rec["status"] == "ok":
            out[model] = json.loads(rec["params_json"])
    return out


def _task(inp: _Inputs, plan: Plan, frequency: str, settings: dict) -> FactorTask:
    dates, values = inp.returns[plan.factor_id]
    params = _params_of(inp, plan.factor_id)
    if plan.kind == "advance":
        state = json.loads(inp.states[(plan.factor_id, MODEL_PREMIUM)]["state_json"])
        keep = dates >= plan.emit_from
        return FactorTask(plan.factor_id, frequency, dates[keep], values[keep], settings,
                          refit=False, params=params, states=state, emit_from=plan.emit_from)
    return FactorTask(plan.factor_id, frequency, dates, values, settings, refit=True,
                      params=params, emit_from=plan.emit_from)


def update(
    store: Store,
    config: Config,
    *,
    refit: set[str] | None = None,
    only: set[str] | None = None,
    progress: Progress | None = None,
    executor: Executor | None = None,
) -> RunSummary:
    """Bring estimates up to date with the stored data.

    Parameters
    ----------
    refit : set of str, optional
        Factors to refit on request; an empty set means all factors.
    only : set of str, optional
        Restrict the run to these factors.
    progress : callable(done, total, label), optional
    executor : Executor, optional
        Where the fits run (default: local processes for refits, this process otherwise).
    """
    with estimation_lock(store) as acquired:
        if not acquired:
            return RunSummary(skipped="another process is estimating; its results will appear when it finishes")
        summary = _update_locked(store, config, refit, only, progress, executor)
        from tracker.service.assets import update_exposures

        n = update_exposures(store, config)
        if n:
            summary.kinds["*exposures*"] = "advance"
            summary.rows_written += n
        return summary


def _update_locked(store, config, refit, only, progress, executor) -> RunSummary:
    started = datetime.now()
    inp = _read_inputs(store)
    plans = _plan(inp, config, refit, only)
    market_needed = bool(plans) or (refit is not None) or not market_mod.has_state(inp.states)
    if not plans and not market_needed:
        return RunSummary(kinds={})
    settings = _settings(config)
    freq = dict(zip(inp.factors["factor_id"], inp.factors["frequency"]))
    tasks = [_task(inp, p, freq[p.factor_id], settings) for p in plans]
    heavy = [t for t in tasks if t.refit]
    light = [t for t in tasks if not t.refit]
    total = len(tasks) + 1
    done = 0
    outputs: dict[str, FactorOutput] = {}
    if progress:
        progress(0, total, "estimating")
    runner = executor or (executor_for(config) if len(heavy) > 1 else SerialExecutor())
    for out in runner.map(run_factor, heavy):
        outputs[out.factor_id] = out
        done += 1
        if progress:
            progress(done, total, f"fitted {out.factor_id}")
    for out in SerialExecutor().map(run_factor, light):
        outputs[out.factor_id] = out
        done += 1
        if progress:
            progress(done, total, f"filtered {out.factor_id}")

    market = market_mod.run_market(inp, config, refit_all=refit is not None and not refit,
                                   rederive=any(p.kind == "rederive" for p in plans))
    if not plans and market is None:
        return RunSummary(kinds={})
    if progress:
        progress(total, total, "writing results")
    rows = _write(store, config, inp, plans, outputs, market, started)
    kinds = {p.factor_id: p.kind for p in plans}
    if market is not None and market.emitted:
        kinds[market_mod.MARKET] = market.kind
    return RunSummary(kinds=kinds, rows_written=rows)


def _emit_mask(out: FactorOutput, plan: Plan) -> np.ndarray:
    if plan.emit_from is None:
        return np.zeros(out.dates.size, dtype=bool)
    return (out.dates >= plan.emit_from) & np.isfinite(out.returns)


def _premium_frame(out: FactorOutput, plan: Plan, frequency: str, fit_id: int | None) -> pd.DataFrame:
    m = _emit_mask(out, plan)
    ppy = PERIODS_PER_YEAR[frequency]
    sd = np.sqrt(out.premium_var[m])
    prem = out.premium[m]
    return pd.DataFrame({
        "factor_id": out.factor_id,
        "date": out.dates[m].astype("datetime64[ns]"),
        "vintage": plan.vintage,
        "fit_id": fit_id,
        "premium": prem,
        "premium_sd": sd,
        "premium_ann": prem * ppy,
        "premium_ann_sd": sd * ppy,
        "regime_premium": out.regime_premium[m],
        "regime_premium_sd": np.sqrt(out.regime_premium_var[m]),
        "vol_forecast": out.vol_forecast[m],
        "sharpe_ann": prem / out.vol_forecast[m] * math.sqrt(ppy),
        "snr": out.snr[m],
        "std_error": out.std_error[m],
        "loglik_t": out.loglik_t[m],
    })


def regime_frame(subject: str, dates, filtered, predicted, vintage: int, fit_id) -> pd.DataFrame:
    ok = np.all(np.isfinite(filtered), axis=1)
    f, p = filtered[ok], predicted[ok]
    return pd.DataFrame({
        "subject_id": subject,
        "date": np.asarray(dates)[ok].astype("datetime64[ns]"),
        "vintage": vintage,
        "fit_id": fit_id,
        "n_regimes": f.shape[1],
        "regime": np.argmax(f, axis=1).astype(int),
        "probability": np.max(f, axis=1),
        "filtered": [list(map(float, r)) for r in f],
        "predicted": [list(map(float, r)) for r in p],
    })


def _full_history(store: Store, out: FactorOutput, plan: Plan):
    """Arrays over the whole history for the latest-date rules."""
    if plan.kind != "advance":
        return (out.dates, out.returns, out.premium, out.premium_var, out.std_error,
                out.loglik_t, out.regime_filtered)
    with store.connect() as con:
        hist = con.execute(sql("estimation.current_premium_history"), [out.factor_id]).df()
        reg = con.execute(sql("estimation.current_regime_history"), [out.factor_id]).df()
        rets = con.execute(sql("estimation.factor_returns_for"), [out.factor_id]).df()
    rets = rets[rets["date"] < pd.Timestamp(plan.emit_from)]
    old_dates = rets["date"].to_numpy().astype("datetime64[D]")
    hist = hist.set_index(hist["date"].to_numpy().astype("datetime64[D]")).reindex(old_dates)
    k = out.regime_filtered.shape[1] if out.regime_filtered is not None else 0
    if k:
        reg_map = {np.datetime64(pd.Timestamp(d).date(), "D"): v for d, v in zip(reg["date"], reg["filtered"])}
        old_reg = np.array([reg_map.get(d, [np.nan] * k) for d in old_dates], dtype=float).reshape(-1, k)
        full_reg = np.vstack([old_reg, out.regime_filtered])
    else:
        full_reg = None
    return (
        np.concatenate([old_dates, out.dates]),
        np.concatenate([rets["ret"].to_numpy(float), out.returns]),
        np.concatenate([hist["premium"].to_numpy(float), out.premium]),
        np.concatenate([hist["premium_sd"].to_numpy(float) ** 2, out.premium_var]),
        np.concatenate([hist["std_error"].to_numpy(float), out.std_error]),
        np.concatenate([hist["loglik_t"].to_numpy(float), out.loglik_t]),
        full_reg,
    )


def _warning_frames(store, config, inp, plans, outputs) -> list[pd.DataFrame]:
    th = config.warnings or wr.WarningThresholds()
    meta = inp.factors.set_index("factor_id")
    frames = []
    # significance across the tracked set, from every factor's whole history
    tests = {fid: significance_of(vals) for fid, (_, vals) in inp.returns.items()}
    ids = list(tests)
    p = np.array([tests[f].p_value for f in ids], dtype=float)
    p_adj = dict(zip(ids, wr.tracked_set_adjusted_p(p, th)))
    latest_by_freq: dict[str, np.datetime64] = {}
    for fid, (dates, _) in inp.returns.items():
        fr = meta.loc[fid, "frequency"]
        latest_by_freq[fr] = max(latest_by_freq.get(fr, dates[-1]), dates[-1])
    for plan in plans:
        out = outputs.get(plan.factor_id)
        if out is None:
            continue
        fr = meta.loc[plan.factor_id, "frequency"]
        m = _emit_mask(out, plan)
        if m.any():
            first = int(np.argmax(m))
            n_prior = 0 if plan.kind != "advance" else int(np.sum(inp.returns[plan.factor_id][0] < plan.emit_from))
            rows = per_date_warnings(out, fr, first, n_prior, th)
            full = _full_history(store, out, plan)
            status = {**{k: v for k, v in _fit_statuses(inp, plan.factor_id).items()}, **out.status}
            msg = {**_fit_messages(inp, plan.factor_id), **out.message}
            test = tests[plan.factor_id]
            ctx = LatestContext(
                frequency=fr, is_new=bool(meta.loc[plan.factor_id, "is_new"]),
                t_stat=test.t_stat, p_value=test.p_value, p_adjusted=float(p_adj[plan.factor_id]),
                latest_date_in_set=latest_by_freq[fr],
                revision_count=int(inp.recent_revisions.get(plan.factor_id, 0)),
                fit_status=status.get(MODEL_PREMIUM, "failed"), fit_message=msg.get(MODEL_PREMIUM, ""),
                regime_status=status.get(MODEL_REGIMES, "failed"), regime_message=msg.get(MODEL_REGIMES, ""),
            )
            last_rows = latest_warnings(out, ctx, th, *full)
            last_date = full[0][-1]
            rows = [r for r in rows if r["date"] != last_date] + last_rows
            if rows:
                df = pd.DataFrame(rows)
                df["date"] = pd.to_datetime(df["date"])
                df["vintage"] = plan.vintage
                frames.append(df)
    return frames


def _fit_statuses(inp: _Inputs, fid: str) -> dict:
    return {m: r["status"] for (s, m), r in inp.fits.items() if s == fid}


def _fit_messages(inp: _Inputs, fid: str) -> dict:
    return {m: r["message"] for (s, m), r in inp.fits.items() if s == fid}


def _write(store, config, inp, plans, outputs, market, started) -> int:
    meta = inp.factors.set_index("factor_id")
    warn_frames = _warning_frames(store, config, inp, plans, outputs)
    written = 0
    with store.transaction() as con:
        stamps = {(r[0], r[1]): r[3] for r in con.execute(sql("estimation.state_stamps")).fetchall()}
        if stamps != inp.stamps:
            raise ConcurrentUpdate("another process updated the estimates meanwhile")
        for plan in plans:
            out = outputs[plan.factor_id]
            fr = meta.loc[plan.factor_id, "frequency"]
            dates, _ = inp.returns[plan.factor_id]
            fit_ids = {}
            for rec in out.fits:
                fit_id = con.execute(sql("estimation.next_fit_id")).fetchone()[0]
                con.execute(sql("estimation.retire_fits"), [plan.factor_id, rec.model])
                con.execute(sql("estimation.insert_fit"), [
                    fit_id, plan.factor_id, rec.model, rec.status, rec.message, dumps(rec.params),
                    rec.loglik if math.isfinite(rec.loglik) else None, rec.n_obs, rec.converged,
                    _d(dates[0]), _d(dates[-1]), plan.reason,
                ])
                fit_ids[rec.model] = fit_id
            premium_fit = fit_ids.get(MODEL_PREMIUM) or _current_fit_id(inp, plan.factor_id, MODEL_PREMIUM)
            regime_fit = fit_ids.get(MODEL_REGIMES) or _current_fit_id(inp, plan.factor_id, MODEL_REGIMES)
            if plan.kind == "rederive":
                for q in ("supersede_premium", "supersede_regime", "supersede_warnings"):
                    con.execute(sql(f"estimation.{q}"), [plan.factor_id, _d(plan.emit_from)])
            pf = _premium_frame(out, plan, fr, premium_fit)
            if len(pf):
                con.register("incoming_frame", pf)
                con.execute(sql("estimation.insert_premium_frame"))
                con.unregister("incoming_frame")
                written += len(pf)
            if out.regime_filtered is not None:
                m = _emit_mask(out, plan)
                rf = regime_frame(plan.factor_id, out.dates[m], out.regime_filtered[m],
                                  out.regime_predicted[m], plan.vintage, regime_fit)
                if len(rf):
                    con.register("incoming_frame", rf)
                    con.execute(sql("estimation.insert_regime_frame"))
                    con.unregister("incoming_frame")
            con.execute(sql("estimation.upsert_filter_state"), [
                plan.factor_id, MODEL_PREMIUM, premium_fit or 0, _d(dates[-1]), dumps(out.states), inp.read_at,
            ])
            con.execute(sql("estimation.insert_run"), [
                con.execute(sql("estimation.next_run_id")).fetchone()[0], plan.kind, plan.reason,
                plan.factor_id, _d(plan.emit_from) if plan.emit_from is not None else None,
                _d(dates[-1]), started, "ok", "",
            ])
        for df in warn_frames:
            con.register("incoming_frame", df)
            con.execute(sql("estimation.insert_warning_frame"))
            con.unregister("incoming_frame")
        if market is not None:
            market_mod.write_market(con, market, inp, started)
        con.execute(sql("estimation.bump_version"))
    return written


def _current_fit_id(inp: _Inputs, fid: str, model: str):
    rec = inp.fits.get((fid, model))
    return None if rec is None else int(rec["fit_id"])


def _d(x) -> object:
    return pd.Timestamp(x).date()


class ConcurrentUpdate(Exception):
    """The store's estimates changed between reading the inputs and writing the results."""
