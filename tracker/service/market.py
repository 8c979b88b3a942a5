"""The joint market regime: a Gaussian HMM over the long-history daily factors.

Which factors enter: daily factors whose history covers at least 90% of the dates of
the longest daily series (a newly proposed factor with a short history stays out, so it
cannot reshape the market regime). Rows where any of them is missing are skipped.
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

from tracker.estimation.market_regime import MarketRegimeModel, MarketRegimeParams, market_filter
from tracker.estimation.markov_regimes import RegimeFilterState
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


def market_columns(inp) -> list[str]:
    daily = inp.factors[inp.factors["frequency"] == "daily"]["factor_id"]
    lengths = {f: inp.returns[f][0].size for f in daily if f in inp.returns}
    if not lengths:
        return []
    longest = max(lengths.values())
    return sorted(f for f, n in lengths.items() if n >= COVERAGE * longest)


def market_matrix(inp, columns: list[str]) -> pd.DataFrame:
    frames = {f: pd.Series(inp.returns[f][1], index=inp.returns[f][0]) for f in columns}
    return pd.DataFrame(frames).dropna()


def run_market(inp, config, *, refit_all: bool, rederive: bool) -> MarketOutput | None:
    columns = market_columns(inp)
    if len(columns) < 2:
        return None
    x = market_matrix(inp, columns)
    if x.empty:
        return None
    dates = x.index.to_numpy().astype("datetime64[D]")
    state_row = inp.states.get((MARKET, MODEL_MARKET))
    fit_row = inp.fits.get((MARKET, MODEL_MARKET))
    vintage = int(inp.vintages.get(MARKET, 0))
    prev_params = None
    if fit_row is not None and fit_row["status"] == "ok":
        prev_params = MarketRegimeParams.from_dict(_params_only(fit_row["params_json"]))
    same_columns = prev_params is not None and tuple(prev_params.columns or ()) == tuple(columns)
    through = None
    if state_row is not None:
        through = np.datetime64(pd.Timestamp(state_row["through_date"]).date(), "D")
    if state_row is None or not same_columns or refit_all or rederive:
        m = config.models
        model = MarketRegimeModel(
            states=tuple(range(m.market_states_min, m.market_states_max + 1)) if m.market_states_min >= 2 else (2,),
            n_seeds=m.market_seeds, seed=m.seed,
        )
        fit = model.fit(x.to_numpy(), previous=prev_params if same_columns else None, columns=tuple(columns))
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
    return MarketOutput("advance", tuple(columns), None, _params_only(fit_row["params_json"]),
                        flt.state.to_dict(), dates[new], flt.filtered, flt.predicted, dates[-1], vintage, None)


def write_market(con, out: MarketOutput, inp, started) -> None:
    from tracker.service.estimate import regime_frame

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
        rf = regime_frame(MARKET, out.dates, out.filtered, out.predicted, out.vintage, fit_id)
        con.register("incoming_frame", rf)
        con.execute(sql("estimation.insert_regime_frame"))
        con.unregister("incoming_frame")
    if out.state:
        con.execute(sql("estimation.upsert_filter_state"), [
            MARKET, MODEL_MARKET, fit_id or 0, pd.Timestamp(out.through).date(), dumps(out.state), inp.read_at,
        ])


def _f(x) -> float | None:
    return float(x) if x is not None and math.isfinite(float(x)) else None


def _params_only(text: str) -> dict:
    d = json.loads(text)
    d.pop("selection", None)
    return d
