"""The joint market regime: a Gaussian HMM over the long-history daily factors.

Which factors enter: daily factors whose history covers at least 90% of the dates of
the longest daily series (a newly proposed factor with a short history stays out, so it
cannot reshape the market regime). Rows where any of them is missing are skipped.
``[models] market_factors`` names them explicitly; with 'auto' (default) and more than
``market_factors_max`` eligible factors, the most volatile ones are kept (volatility
states are what the model separates, and a full-covariance HMM over hundreds of factors
has more parameters than a history can pin down), and once fitted the set stays as long
as its factors stay eligible, so new rows do not reshuffle it.
The model is refit when there is no fit, on a refit of all factors, after a revision,
or when the set of factors changes; otherwise new complete rows are filtered from the
saved state.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass

import numpy as np
import pandas as pd

from tracker.estimation.market_regime import (
    EmRun,
    EmStart,
    MarketRegimeFit,
    MarketRegimeModel,
    MarketRegimeParams,
    PreparedMarketFit,
    market_filter,
)
from tracker.estimation.markov_regimes import RegimeFilterState
from tracker.service.estimate_io import BOOK_KEY, Book, FrameBatch, regime_columns
from tracker.service.executor import one_blas_thread
from tracker.service.factor_models import dumps
from tracker.store.sqlfiles import sql

MARKET = "*market*"
MODEL_MARKET = "market"
COVERAGE = 0.9


@dataclass(frozen=True)
class MarketOutput:
    kind: str                         # fit or advance
    columns: tuple[str, ...]
    fit: object | None                # MarketRegimeFit when refitted
    params: dict
    state: dict
    dates: np.ndarray                 # emitted dates
    filtered: np.ndarray
    predicted: np.ndarray
    through: np.datetime64
    vintage: int
    supersede_from: np.datetime64 | None

    @property
    def emitted(self) -> bool:
        return self.dates.size > 0 or self.fit is not None


def has_state(states: dict) -> bool:
    return (MARKET, MODEL_MARKET) in states


@dataclass(frozen=True)
class MarketInput:
    """What the market run needs from the store: its columns and the complete rows to use
    (all of them for a fit, those after the saved state for an advance)."""

    columns: tuple[str, ...]
    refit: bool
    matrix: pd.DataFrame              # (T, N) complete rows, columns in ``columns`` order


def eligible_columns(inp) -> list[str]:
    """Daily factors with at least COVERAGE of the longest daily history."""
    daily = inp.factors[inp.factors["frequency"] == "daily"]["factor_id"]
    lengths = {f: inp.rows[f].n_rows for f in daily if f in inp.rows}
    if not lengths:
        return []
    longest = max(lengths.values())
    return sorted(f for f, n in lengths.items() if n >= COVERAGE * longest)


def choose_columns(eligible, spec: str, cap: int, previous, variances) -> list[str]:
    """The market regime's factors (see the module docstring).

    ``variances`` is called (only when a choice by volatility is needed) and returns
    factor id -> sample variance.
    """
    eligible = sorted(eligible)
    if spec.strip().lower() != "auto":
        wanted = {f.strip() for f in spec.split(",") if f.strip()}
        return [f for f in eligible if f in wanted]
    if len(eligible) <= cap:
        return eligible
    if previous and len(previous) == cap and set(previous) <= set(eligible):
        return sorted(previous)
    var = variances()
    return sorted(sorted(eligible, key=lambda f: (-float(var.get(f, 0.0)), f))[:cap])


def market_columns(inp, con=None, config=None) -> list[str]:
    eligible = eligible_columns(inp)
    if config is None:
        return eligible
    prev = _previous(inp)

    def variances() -> dict:
        rows = con.execute(sql("estimation.factor_variances"), [eligible]).fetchall()
        return {f: v for f, v in rows if v is not None}

    m = config.models
    return choose_columns(eligible, m.market_factors, m.market_factors_max,
                          tuple(prev.columns) if prev is not None and prev.columns else None, variances)


def _previous(inp):
    """The current market fit's parameters (parsed once per run: at 500 factors with full
    covariances they are 10 MB of JSON)."""
    return _previous_with_dict(inp)[0]


def _previous_with_dict(inp):
    cache = getattr(inp, "_market_previous", None)
    if cache is None:
        fit_row = inp.fits.get((MARKET, MODEL_MARKET))
        params, raw = None, None
        if fit_row is not None and fit_row["status"] == "ok":
            raw = _params_only(fit_row["params_json"])
            params = MarketRegimeParams.from_dict(raw)
        cache = inp._market_previous = (params, raw)
    return cache


def _wants_fit(inp, columns, *, refit_all: bool, rederive: bool) -> bool:
    prev = _previous(inp)
    same_columns = prev is not None and tuple(prev.columns or ()) == tuple(columns)
    return (MARKET, MODEL_MARKET) not in inp.states or not same_columns or refit_all or rederive


def read_market_input(con, inp, *, refit_all: bool, rederive: bool, config=None) -> MarketInput | None:
    """Read the market's rows on the caller's connection: whole columns only for a fit."""
    columns = market_columns(inp, con, config)
    if len(columns) < 2:
        return None
    refit = _wants_fit(inp, columns, refit_all=refit_all, rederive=rederive)
    if refit:
        df = con.execute(sql("estimation.factor_returns_of"), [columns]).df()
    else:
        through = pd.Timestamp(inp.states[(MARKET, MODEL_MARKET)]["through_date"]).date()
        df = con.execute(sql("estimation.factor_returns_of_after"), [columns, through]).df()
    x = df.pivot(index="date", columns="factor_id", values="ret").reindex(columns=columns).dropna()
    x.columns.name = None
    return MarketInput(tuple(columns), refit, x)


@dataclass(frozen=True)
class MarketFitTask:
    """A due market fit: its data and settings (:func:`fit_task`). A refit spreads its EM
    runs over the workers beside the factors' fits (:func:`run_tasks`); elsewhere it runs
    whole (:func:`run_fit_task`)."""

    x: np.ndarray                     # (T, N) complete rows, decimal
    columns: tuple[str, ...]
    previous: MarketRegimeParams | None
    warm_start: bool
    states: tuple[int, ...]
    n_seeds: int
    seed: int

    def model(self) -> MarketRegimeModel:
        return MarketRegimeModel(states=self.states, n_seeds=self.n_seeds, seed=self.seed)

    def prepare(self) -> PreparedMarketFit | MarketRegimeFit:
        """:meth:`MarketRegimeModel.prepare` of this fit (a failed fit if the data cannot be fitted)."""
        return self.model().prepare(self.x, previous=self.previous, columns=self.columns,
                                    warm_start=self.warm_start)


@dataclass(frozen=True)
class MarketRunTask:
    """One EM run of a due market fit, as a picklable worker task (:func:`run_start_task`)."""

    fit: MarketFitTask
    start: EmStart


def fit_task(inp, config, *, cold: bool = False) -> MarketFitTask | None:
    """The market fit this run needs (None when the market only advances or has no rows)."""
    mk = inp.market
    if mk is None or not mk.refit or mk.matrix.empty:
        return None
    m = config.models
    prev_params = _previous(inp)
    same_columns = prev_params is not None and tuple(prev_params.columns or ()) == tuple(mk.columns)
    # a refit of a store that has a market fit over the same factors starts from it
    # (see MarketRegimeModel.fit); a first fit, or new factors, is cold
    return MarketFitTask(
        mk.matrix.to_numpy(), tuple(mk.columns), prev_params if same_columns else None,
        same_columns and not cold,
        tuple(range(m.market_states_min, m.market_states_max + 1)) if m.market_states_min >= 2 else (2,),
        m.market_seeds, m.seed)


def run_tasks(task: MarketFitTask, prepared: PreparedMarketFit) -> list[MarketRunTask]:
    """The fit's EM runs as worker tasks, most states first: the longest runs (a cold fit
    of 10 factors x 15,000 days: ~0.5-2 s each for 4 states, 9 runs in all) start first, so
    the factors' shorter fits fill in around them."""
    starts = sorted(prepared.starts, key=lambda s: -s.n_states)      # stable within a number
    return [MarketRunTask(task, s) for s in starts]


def run_start_task(task: MarketRunTask) -> EmRun:
    """Top-level (picklable) worker: one EM run of the market fit. The worker prepares the
    data itself, as the caller did, so the same standardised rows are fitted."""
    prepared = task.fit.prepare()
    if isinstance(prepared, MarketRegimeFit):       # cannot happen: the caller's passed
        raise RuntimeError(f"market fit cannot be prepared: {prepared.message}")
    return task.fit.model().run_start(prepared, task.start)


def finish_fit(task: MarketFitTask, prepared: PreparedMarketFit, runs) -> MarketRegimeFit:
    """The market fit from its EM runs (BLAS on one thread, as in the workers)."""
    with one_blas_thread():
        return task.model().finish(prepared, runs)


def run_fit_task(task: MarketFitTask):
    """The whole market fit in this process (its EM runs one after another)."""
    return task.model().fit(task.x, previous=task.previous, columns=task.columns,
                            warm_start=task.warm_start)


def run_market(inp, config, *, refit_all: bool, rederive: bool, cold: bool = False,
               fit=None) -> MarketOutput | None:
    """The market's output for this run; ``fit`` is the result of :func:`run_fit_task` when
    the caller already ran the fit (in a worker), else a due fit is run here."""
    mk = inp.market
    if mk is None:
        return None
    columns = list(mk.columns)
    x = mk.matrix
    if x.empty:
        return None
    dates = x.index.to_numpy().astype("datetime64[D]")
    state_row = inp.states.get((MARKET, MODEL_MARKET))
    vintage = int(inp.vintages.get(MARKET, 0))
    prev_params = _previous(inp)
    same_columns = prev_params is not None and tuple(prev_params.columns or ()) == tuple(columns)
    through = None
    if state_row is not None:
        through = np.datetime64(pd.Timestamp(state_row["through_date"]).date(), "D")
    if mk.refit:
        if fit is None:
            with one_blas_thread():                # as in a refit's workers
                fit = run_fit_task(fit_task(inp, config, cold=cold))
        if fit.status != "ok" or fit.filtered is None:
            return MarketOutput("fit", tuple(columns), fit, {}, {}, dates[:0], np.empty((0, 0)),
                                np.empty((0, 0)), dates[-1], vintage, None)
        if state_row is None:
            emit = np.ones(dates.size, dtype=bool)
            vintage, sup = max(vintage, 0) + 1, None
        elif rederive or not same_columns:
            emit = np.ones(dates.size, dtype=bool)
            vintage, sup = vintage + 1, dates[0]
        else:
            emit = dates > through
            sup = None
        filt = fit.filtered
        return MarketOutput("fit", tuple(columns), fit, fit.params.to_dict(), filt.state.to_dict(),
                            dates[emit], filt.filtered[emit], filt.predicted[emit], dates[-1], vintage, sup)
    new = dates > through
    if not new.any():
        return None
    state = RegimeFilterState.from_dict(json.loads(state_row["state_json"]))
    flt = market_filter(x.to_numpy()[new], prev_params, state)
    return MarketOutput("advance", tuple(columns), None, _previous_with_dict(inp)[1],
                        flt.state.to_dict(), dates[new], flt.filtered, flt.predicted, dates[-1], vintage, None)


def write_market(con, out: MarketOutput, inp, started) -> None:
    fit_id = None
    if out.fit is not None:
        fit = out.fit
        fit_id = con.execute(sql("estimation.next_fit_id")).fetchone()[0]
        con.execute(sql("estimation.retire_fits"), [MARKET, MODEL_MARKET])
        params = out.params if fit.status == "ok" else {}
        extra = {"columns": list(out.columns), "bic_by_states": {str(k): _f(v) for k, v in fit.bic_by_states.items()}}
        con.execute(sql("estimation.insert_fit"), [
            fit_id, MARKET, MODEL_MARKET, fit.status, fit.message, dumps({**params, "selection": extra}),
            _f(fit.loglik), int(fit.n_obs), bool(fit.converged),
            None, pd.Timestamp(out.through).date(), "initial" if not has_state(inp.states) else "refit",
        ])
    else:
        row = inp.fits.get((MARKET, MODEL_MARKET))
        fit_id = None if row is None else int(row["fit_id"])
    if out.supersede_from is not None:
        con.execute(sql("estimation.supersede_regime"), [MARKET, pd.Timestamp(out.supersede_from).date()])
    if out.dates.size:
        rows = FrameBatch(con, "estimation.insert_regime_frame")
        rows.add({"subject_id": MARKET, "vintage": out.vintage, "fit_id": fit_id},
                 regime_columns(out.dates, out.filtered, out.predicted))
        rows.flush()
    if out.state:
        through = pd.Timestamp(out.through).date()
        book = Book(through=str(through), drop_seen=int(inp.drop_seen), vintage=int(out.vintage))
        con.execute(sql("estimation.upsert_filter_state"), [
            MARKET, MODEL_MARKET, fit_id or 0, through, dumps({**out.state, BOOK_KEY: book.to_dict()}), inp.read_at,
        ])


def _f(x) -> float | None:
    return float(x) if x is not None and math.isfinite(float(x)) else None


def _params_only(text: str) -> dict:
    d = json.loads(text)
    d.pop("selection", None)
    return d
