"""Cheap estimated state for large benchmark stores: filter at borrowed parameters.

A real backfill of 500 factors x 15,000 days took hours on two cores when the Kim fit
cost 5-13 s a factor; it now takes about two minutes (112 s measured with
``--refit-max 500 --refit-repeats 1 --naive-factors 10``), but three of them, and the
default naive loop over every factor of the cell (~30 min of statsmodels), would make the
default grid slow. So for the incremental measurements on large stores the bench builds
the stored state another way by default, and says so in its output:

1. a few *twin* factors are fitted for real (:func:`run_factor` with ``refit=True``);
2. every other factor gets a twin's parameters rescaled to its own volatility (the
   synthetic factors share one regime chain and differ in scale: premium and regime
   variances scale by s^2 = (sigma_i / sigma_twin)^2, means and shifts by s, the EWMA
   decay and the variance multipliers c are scale-free), marked in ``model_fits`` with a
   message saying they were borrowed, not fitted;
3. every factor is filtered over its whole history at those parameters
   (``refit=False``) and written by the estimation service's own writer, exactly as a
   backfill would write it (estimates, regimes, warnings, filter states), in batches so
   the outputs of 500 long histories are never all held in memory;
4. the market regime is either fitted by the service's own ``run_market`` (``market="fit"``;
   the full-covariance HMM costs minutes at 50 factors and is out of reach at 500) or set
   from the synthetic truth (``market="truth"``: per-regime sample moments on the true
   labels, the chain's empirical transition matrix), filtered over the history and written
   by the service's market writer, so later updates advance it as they would a fit.

After this, ``update()`` sees an ordinary estimated store and advances it.
"""

from __future__ import annotations

import dataclasses
import math
from datetime import datetime

import numpy as np

from tracker.config import Config
from tracker.estimation.market_regime import MarketRegimeFit, MarketRegimeParams, market_filter
from tracker.service import estimate as est
from tracker.service import market as market_mod
from tracker.service.bench_data import SyntheticPanel
from tracker.service.executor import Executor, SerialExecutor
from tracker.service.factor_models import (
    MODEL_PREMIUM,
    MODEL_REGIME_PREMIUM,
    MODEL_REGIMES,
    MODEL_VOL,
    FactorOutput,
    FactorTask,
    FitRecord,
)
from tracker.service.factor_warnings import run_factor_with_warnings
from tracker.store.connection import Store
from tracker.store.sqlfiles import sql

BORROWED = "bench: parameters of fitted twin {twin} rescaled by the volatility ratio {s:.4g}; not fitted"


def scale_params(params: dict, s: float) -> dict:
    """A twin's parameter dicts rescaled to a factor whose returns are ``s`` times larger."""
    out = {}
    s2 = s * s
    for model, p in params.items():
        p = dict(p)
        if model == MODEL_PREMIUM and p:
            for key in ("q", "q_mle"):
                if p.get(key) is not None:
                    p[key] = p[key] * s2
        elif model == MODEL_REGIMES and p:
            p["means"] = [m * s for m in p["means"]]
            p["variances"] = [v * s2 for v in p["variances"]]
        elif model == MODEL_REGIME_PREMIUM and p:
            p["q"] = p["q"] * s2
            p["m"] = [m * s for m in p["m"]]
        out[model] = p
    return out


def _borrowed_fits(params: dict, twin: str, s: float, n_obs: int) -> tuple[FitRecord, ...]:
    msg = BORROWED.format(twin=twin, s=s)
    return tuple(FitRecord(m, "ok", msg, params[m], float("nan"), n_obs, True)
                 for m in (MODEL_VOL, MODEL_PREMIUM, MODEL_REGIMES, MODEL_REGIME_PREMIUM) if params.get(m))


def _filter_task(args) -> FactorOutput:
    """Top-level (picklable) worker: filter one factor at borrowed parameters."""
    task, twin, s, th = args
    out = run_factor_with_warnings((task, th))
    return dataclasses.replace(out, fits=_borrowed_fits(task.params, twin, s, int(np.isfinite(task.returns).sum())))


def build_borrowed_state(store: Store, config: Config, panel: SyntheticPanel, *, n_twins: int = 2,
                         batch: int = est.STREAM_CHUNK, executor: Executor | None = None,
                         market: str = "truth") -> dict:
    """Estimate every factor of a freshly loaded synthetic store at borrowed parameters.

    Returns a dict with the twins, the seconds spent fitting them and filtering the rest,
    and the market fit's status.
    """
    executor = executor or SerialExecutor()
    settings = dataclasses.asdict(config.models)
    t = panel.n_days
    dates = panel.dates[:t]
    n_twins = max(1, min(n_twins, panel.n_factors))
    twin_idx = list(range(n_twins))
    t0 = datetime.now()
    th = est._thresholds(config)
    tasks = [(FactorTask(panel.factor_ids[i], "daily", dates, panel.returns[:t, i], settings, refit=True,
                         emit_from=dates[0]), th) for i in twin_idx]
    twin_out = {o.factor_id: o for o in executor.map(run_factor_with_warnings, tasks)}
    fit_s = (datetime.now() - t0).total_seconds()
    usable = [panel.factor_ids[i] for i in twin_idx
              if all(twin_out[panel.factor_ids[i]].status.get(m) == "ok" for m in (MODEL_PREMIUM, MODEL_REGIMES))]
    if not usable:
        raise RuntimeError("no twin factor fitted cleanly; cannot borrow parameters")
    vol = dict(zip(panel.factor_ids, panel.vol))
    t1 = datetime.now()
    ids = list(panel.factor_ids)
    for start in range(0, len(ids), batch):
        chunk = set(ids[start:start + batch])
        inp, plans = est._read_inputs(store, config, only=chunk, market=False)
        outputs, work = {}, []
        for plan in plans:
            fid = plan.factor_id
            i = ids.index(fid)
            if fid in twin_out:
                outputs[fid] = twin_out[fid]
                continue
            twin = usable[i % len(usable)]
            s = float(vol[fid] / vol[twin])
            params = scale_params(twin_out[twin].params, s)
            work.append((FactorTask(fid, "daily", dates, panel.returns[:t, i], settings, refit=False,
                                    params=params, emit_from=dates[0]), twin, s, th))
        for out in executor.map(_filter_task, work):
            outputs[out.factor_id] = out
        est._write(store, config, inp, plans, outputs, None, t1)
    t2 = datetime.now()
    if market == "truth":
        market_info = write_truth_market(store, config, panel)
    else:
        inp, _ = est._read_inputs(store, config, only=set())
        out = market_mod.run_market(inp, config, refit_all=False, rederive=False)
        est._write(store, config, inp, [], {}, out, t2)
        market_info = {}
    with store.connect() as con:
        mfit = con.execute(sql("views.market_fit")).fetchone()
    return {
        "twins": usable,
        "twin_fit_s": fit_s,
        "filter_write_s": (t2 - t1).total_seconds(),
        "market": market,
        "market_s": (datetime.now() - t2).total_seconds(),
        "market_status": None if mfit is None else mfit[0],
        "market_message": None if mfit is None else mfit[1],
        **market_info,
    }


def truth_market_columns(panel: SyntheticPanel, config: Config) -> list[int]:
    """Column indices of the factors the service's market regime would use."""
    t = panel.n_days
    ids = list(panel.factor_ids)
    var = dict(zip(ids, np.var(panel.returns[:t], axis=0, ddof=1)))
    m = config.models
    chosen = market_mod.choose_columns(ids, m.market_factors, m.market_factors_max, None, lambda: var)
    return [ids.index(f) for f in chosen]


def truth_market_params(panel: SyntheticPanel, columns: list[int] | None = None) -> MarketRegimeParams:
    """Market-regime parameters from the synthetic truth: per-regime sample means and
    covariances on the true regime labels (shrunk toward the diagonal by N / rows), the
    empirical transition matrix of the chain; over ``columns`` (default all)."""
    t = panel.n_days
    cols = list(range(panel.n_factors)) if columns is None else list(columns)
    x, s = panel.returns[:t][:, cols], panel.regimes[:t]
    k = 2
    means = np.array([x[s == j].mean(axis=0) for j in range(k)])
    covars = []
    for j in range(k):
        c = np.cov(x[s == j], rowvar=False)
        # with fewer rows than factors a sample covariance is singular: shrink toward its
        # diagonal (weight N / rows, capped at 1) so the filter has a density
        w = min(1.0, x.shape[1] / max(int((s == j).sum()), 1))
        covars.append((1 - w) * c + w * np.diag(np.diag(c)))
    covars = np.array(covars)
    counts = np.zeros((k, k))
    np.add.at(counts, (s[:-1], s[1:]), 1)
    trans = counts / counts.sum(axis=1, keepdims=True)
    start = np.bincount(s, minlength=k) / s.size
    return MarketRegimeParams(k, means, covars, "full", trans, start, tuple(panel.factor_ids[i] for i in cols))


def write_truth_market(store: Store, config: Config, panel: SyntheticPanel) -> dict:
    """Store a market regime set from the synthetic truth (not fitted), filtered over the
    history, through the service's own market writer; later updates advance it."""
    cols = truth_market_columns(panel, config)
    params = truth_market_params(panel, cols)
    t = panel.n_days
    filt = market_filter(panel.returns[:t][:, cols], params)
    fit = MarketRegimeFit("ok", "bench: market regime set from the synthetic truth; not fitted",
                          params.n_states, t, len(cols), params, loglik=filt.loglik,
                          converged=True, filtered=filt)
    dates = panel.dates[:t]
    out = market_mod.MarketOutput("fit", tuple(params.columns), fit, params.to_dict(), filt.state.to_dict(),
                                  dates, filt.filtered, filt.predicted, dates[-1], 1, None)
    inp, _ = est._read_inputs(store, config, only=set())
    est._write(store, config, inp, [], {}, out, datetime.now())
    return {"market_loglik": float(filt.loglik)}


def finite_or_none(x) -> float | None:
    try:
        v = float(x)
    except (TypeError, ValueError):
        return None
    return v if math.isfinite(v) else None
