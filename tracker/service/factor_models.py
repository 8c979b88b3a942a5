"""Per-factor model runs: fit (rarely) and filter (every day), as picklable tasks.

These functions touch no store: they take arrays and saved parameters/states and return
plain results, so the refit can fan out to worker processes or a Dask cluster through
:mod:`tracker.service.executor` with identical results.

Models per factor, in the order they feed each other:

1. volatility forecast ``h_t`` (EWMA by default; GARCH(1,1) optional);
2. premium as a local level, ``f_t = mu_t + e_t``, Var(e_t) = c h_t (Kalman filter);
3. Markov-switching mean and variance regimes (Hamilton filter for real-time probabilities);
4. the regime-aware premium: the local level with regime-dependent measurement variance
   (Kim filter), using the transition matrix of step 3.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from tracker.estimation.kim_filter import KimParams, KimState, filter_kim, fit_kim
from tracker.estimation.local_level import (
    FilterState,
    LocalLevelParams,
    filter_local_level,
    fit_local_level,
    smooth_hindsight,
)
from tracker.estimation.markov_regimes import (
    MarkovRegimeModel,
    RegimeFilterState,
    RegimeParams,
    hamilton_filter,
)
from tracker.estimation.volatility import (
    EwmaParams,
    GarchParams,
    VarianceState,
    ewma_variance,
    fit_garch,
    garch_variance,
)

PERIODS_PER_YEAR = {"daily": 252, "monthly": 12}  # common practice

MODEL_VOL = "volatility"
MODEL_PREMIUM = "premium"
MODEL_REGIMES = "regimes"
MODEL_REGIME_PREMIUM = "regime_premium"
FACTOR_MODELS = (MODEL_VOL, MODEL_PREMIUM, MODEL_REGIMES, MODEL_REGIME_PREMIUM)


@dataclass(frozen=True)
class FitRecord:
    """One model's fit, as stored in ``model_fits``."""

    model: str
    status: str
    message: str
    params: dict
    loglik: float
    n_obs: int
    converged: bool


@dataclass(frozen=True)
class FactorTask:
    """Inputs for one factor.

    ``returns`` (T,) decimal, ``dates`` (T,) datetime64[D]. ``refit`` re-estimates the
    parameters (warm-started from ``params`` when given); otherwise ``params`` and
    ``states`` must hold a previous run's values and only rows after ``states`` are
    filtered. ``emit_from`` is the first date whose estimates are returned.
    """

    factor_id: str
    frequency: str
    dates: np.ndarray
    returns: np.ndarray
    settings: dict
    refit: bool
    params: dict = field(default_factory=dict)    # model -> params dict
    states: dict = field(default_factory=dict)    # model -> state dict
    emit_from: np.datetime64 | None = None


@dataclass(frozen=True)
class FactorOutput:
    """What one task produced. Arrays are aligned with ``dates``."""

    factor_id: str
    fits: tuple[FitRecord, ...]                   # empty when no refit happened
    params: dict                                  # model -> params dict now in force
    states: dict                                  # model -> end state dict
    dates: np.ndarray
    returns: np.ndarray
    premium: np.ndarray
    premium_var: np.ndarray
    forecast_var: np.ndarray
    vol_forecast: np.ndarray                      # sqrt(h_{t+1}) per period
    std_error: np.ndarray
    loglik_t: np.ndarray
    snr: np.ndarray
    regime_premium: np.ndarray
    regime_premium_var: np.ndarray
    regime_filtered: np.ndarray | None            # (T, K)
    regime_predicted: np.ndarray | None           # (T, K)
    status: dict                                  # model -> status of the fit in force
    message: dict


def _nan(n: int) -> np.ndarray:
    return np.full(n, np.nan)


def _finite_or_nan(x: float) -> float:
    return float(x) if x is not None and math.isfinite(x) else float("nan")


def _vol_fit(task: FactorTask, y: np.ndarray) -> tuple[FitRecord, dict]:
    s = task.settings
    if s["volatility"] == "garch":
        fit = fit_garch(y, min_obs=s["min_obs"])
        params = fit.params.to_dict() if fit.status == "ok" else {}
        rec = FitRecord(MODEL_VOL, fit.status, fit.message, {"kind": "garch", **params},
                        _finite_or_nan(fit.loglik), int(np.isfinite(y).sum()), fit.status == "ok")
        return rec, rec.params
    lam = s["ewma_decay_daily"] if task.frequency == "daily" else s["ewma_decay_monthly"]
    params = {"kind": "ewma", **EwmaParams(lam=lam).to_dict()}
    msg = f"EWMA variance, decay {lam} (RiskMetrics 1996); nothing to estimate."
    return FitRecord(MODEL_VOL, "ok", msg, params, float("nan"), int(np.isfinite(y).sum()), True), params


def _vol_filter(params: dict, y: np.ndarray, state: dict | None):
    st = VarianceState.from_dict(state) if state else None
    kind = params.get("kind", "ewma")
    if kind == "garch":
        if "omega" not in params:
            return None
        return garch_variance(y, GarchParams.from_dict(params), st)
    return ewma_variance(y, EwmaParams.from_dict({k: v for k, v in params.items() if k != "kind"}), st)


def drift_floor_q(returns: np.ndarray, frequency: str, drift: float) -> float:
    """Smallest premium-step variance q allowed, from a stated prior on premium drift.

    With ``drift`` the standard deviation per year of the premium's annual Sharpe ratio,
    the per-period premium step has sd ``drift * sd(f) / ppy`` (mu = SR sd(f) / sqrt(ppy)
    and SR moves by ``drift / sqrt(ppy)`` per period). Real premia drift too slowly for
    the likelihood to tell q from zero on any realistic sample; a q of exactly zero makes
    the band shrink like 1/sqrt(T) around a constant and overstates what is known.
    """
    x = returns[np.isfinite(returns)]
    if x.size < 2 or drift <= 0:
        return 0.0
    ppy = PERIODS_PER_YEAR[frequency]
    return float((drift * np.std(x, ddof=1) / ppy) ** 2)


def _apply_floor(fit_params: dict, q_floor: float) -> tuple[dict, bool]:
    if fit_params and fit_params.get("q") is not None and fit_params["q"] < q_floor:
        return {**fit_params, "q": q_floor}, True
    return fit_params, False


def usable_variance(vf) -> np.ndarray:
    """The variance forecasts with the EWMA warm-up rows set missing.

    During the warm-up h is a running mean of a handful of squared returns; one tiny first
    return gives an h orders of magnitude too small, a huge standardized error next, and
    the likelihood then buys it back with a large q (seen on the demo's market factor:
    q 1000 times its value without those rows). Missing h makes the filters skip the rows.
    """
    h = np.array(vf.h, dtype=float, copy=True)
    h[: vf.n_warmup] = np.nan
    return h


def run_factor(task: FactorTask) -> FactorOutput:
    """Fit (if asked) and filter one factor; never raises on bad data."""
    y = np.asarray(task.returns, dtype=float)
    n = y.size
    s = task.settings
    fits: list[FitRecord] = []
    params = dict(task.params)
    states = dict(task.states) if not task.refit else {}
    status = {}
    message = {}

    # 1. volatility
    if task.refit or MODEL_VOL not in params:
        rec, params[MODEL_VOL] = _vol_fit(task, y)
        fits.append(rec)
    vf = _vol_filter(params[MODEL_VOL], y, states.get(MODEL_VOL))
    h = usable_variance(vf) if vf is not None else _nan(n)
    h_next = vf.state.h_next if vf is not None else float("nan")
    if vf is not None:
        states[MODEL_VOL] = vf.state.to_dict()

    # 2. premium (local level)
    prev_ll = LocalLevelParams.from_dict(params[MODEL_PREMIUM]) if params.get(MODEL_PREMIUM) else None
    if task.refit or prev_ll is None:
        fit = fit_local_level(y, h, start=prev_ll, min_obs=s["min_obs"])
        q_floor = drift_floor_q(y, task.frequency, s.get("premium_drift_floor", 0.0))
        fitted, floored = _apply_floor(fit.params.to_dict() if fit.status == "ok" else {}, q_floor)
        msg = fit.message
        if floored:
            msg += (f" The estimated q is below the stated drift floor ({q_floor:.3g}, from "
                    f"premium_drift_floor = {s.get('premium_drift_floor')}); the floor is used.")
            fitted["q_mle"] = fit.params.q
        fits.append(FitRecord(MODEL_PREMIUM, fit.status, msg, fitted,
                              _finite_or_nan(fit.loglik), int(np.isfinite(y).sum()), fit.converged))
        params[MODEL_PREMIUM] = fitted
        status[MODEL_PREMIUM], message[MODEL_PREMIUM] = fit.status, msg
    ll_params = LocalLevelParams.from_dict(params[MODEL_PREMIUM]) if params.get(MODEL_PREMIUM) else None
    if ll_params is not None:
        st = FilterState.from_dict(states[MODEL_PREMIUM]) if states.get(MODEL_PREMIUM) else None
        flt = filter_local_level(ll_params, y, h, state=st, h_next=h_next)
        states[MODEL_PREMIUM] = flt.end_state.to_dict()
        premium, premium_var, forecast_var = flt.mean, flt.var, flt.forecast_var
        std_error, loglik_t, snr = flt.std_error, flt.loglik_t, flt.snr
    else:
        premium = premium_var = forecast_var = std_error = loglik_t = snr = _nan(n)
    h_ahead = np.append(h[1:], h_next)
    vol_forecast = np.sqrt(h_ahead * (ll_params.c if ll_params is not None else 1.0))

    # 3. regimes (Markov-switching mean and variance)
    prev_rp = RegimeParams.from_dict(params[MODEL_REGIMES]) if params.get(MODEL_REGIMES) else None
    if task.refit or prev_rp is None:
        model = MarkovRegimeModel(
            k_regimes=s["regimes"], n_starts=s["regime_starts"], seed=s["seed"],
        )
        finite = np.isfinite(y)
        rfit = model.fit(y[finite], previous=prev_rp)
        fits.append(FitRecord(MODEL_REGIMES, rfit.status, rfit.message,
                              rfit.params.to_dict() if rfit.status == "ok" else {},
                              _finite_or_nan(rfit.loglik), int(finite.sum()), bool(rfit.converged)))
        params[MODEL_REGIMES] = rfit.params.to_dict() if rfit.status == "ok" else {}
        status[MODEL_REGIMES], message[MODEL_REGIMES] = rfit.status, rfit.message
    rp = RegimeParams.from_dict(params[MODEL_REGIMES]) if params.get(MODEL_REGIMES) else None
    regime_filtered = regime_predicted = None
    if rp is not None:
        finite = np.isfinite(y)
        st = RegimeFilterState.from_dict(states[MODEL_REGIMES]) if states.get(MODEL_REGIMES) else None
        rf = hamilton_filter(y[finite], rp, st)
        states[MODEL_REGIMES] = rf.state.to_dict()
        regime_filtered = np.full((n, rp.k_regimes), np.nan)
        regime_predicted = np.full((n, rp.k_regimes), np.nan)
        regime_filtered[finite] = rf.filtered
        regime_predicted[finite] = rf.predicted

    # 4. regime-aware premium (Kim filter), driven by the regime transition matrix
    prev_kp = KimParams.from_dict(params[MODEL_REGIME_PREMIUM]) if params.get(MODEL_REGIME_PREMIUM) else None
    if rp is not None and (task.refit or prev_kp is None):
        kfit = fit_kim(y, h, np.asarray(rp.transition), start=prev_kp, min_obs=s["min_obs"])
        q_floor = drift_floor_q(y, task.frequency, s.get("premium_drift_floor", 0.0))
        kfitted, floored = _apply_floor(kfit.params.to_dict() if kfit.status == "ok" and kfit.params else {}, q_floor)
        kmsg = kfit.message + (" q raised to the stated drift floor." if floored else "")
        fits.append(FitRecord(MODEL_REGIME_PREMIUM, kfit.status, kmsg, kfitted,
                              _finite_or_nan(kfit.loglik), int(np.isfinite(y).sum()), bool(kfit.converged)))
        params[MODEL_REGIME_PREMIUM] = kfitted
        status[MODEL_REGIME_PREMIUM], message[MODEL_REGIME_PREMIUM] = kfit.status, kfit.message
    elif rp is None and task.refit:
        params[MODEL_REGIME_PREMIUM] = {}
    kp = KimParams.from_dict(params[MODEL_REGIME_PREMIUM]) if params.get(MODEL_REGIME_PREMIUM) else None
    if kp is not None:
        st = KimState.from_dict(states[MODEL_REGIME_PREMIUM]) if states.get(MODEL_REGIME_PREMIUM) else None
        kf = filter_kim(kp, y, h, state=st, h_next=h_next)
        states[MODEL_REGIME_PREMIUM] = kf.end_state.to_dict()
        regime_premium, regime_premium_var = kf.mean, kf.var
    else:
        regime_premium = regime_premium_var = _nan(n)

    return FactorOutput(
        factor_id=task.factor_id, fits=tuple(fits), params=params, states=states,
        dates=np.asarray(task.dates), returns=y, premium=premium, premium_var=premium_var,
        forecast_var=forecast_var, vol_forecast=vol_forecast, std_error=std_error,
        loglik_t=loglik_t, snr=snr, regime_premium=regime_premium,
        regime_premium_var=regime_premium_var, regime_filtered=regime_filtered,
        regime_predicted=regime_predicted, status=status, message=message,
    )


def hindsight_premium(params: dict, returns: np.ndarray) -> np.ndarray | None:
    """The smoothed premium path over the whole sample: HINDSIGHT, for display only."""
    if not params.get(MODEL_PREMIUM):
        return None
    vf = _vol_filter(params[MODEL_VOL], returns, None)
    if vf is None:
        return None
    sm = smooth_hindsight(LocalLevelParams.from_dict(params[MODEL_PREMIUM]), returns, usable_variance(vf))
    return sm.mean


def refiltered_premium(params: dict, returns: np.ndarray, *, q_scale: float = 1.0) -> tuple[float, float]:
    """Last filtered premium and its sd at the stored parameters with q scaled (fragility)."""
    if not params.get(MODEL_PREMIUM):
        return float("nan"), float("nan")
    vf = _vol_filter(params[MODEL_VOL], returns, None)
    if vf is None or returns.size == 0:
        return float("nan"), float("nan")
    p = LocalLevelParams.from_dict(params[MODEL_PREMIUM])
    p = LocalLevelParams(q=p.q * q_scale, c=p.c)
    flt = filter_local_level(p, returns, usable_variance(vf))
    return float(flt.mean[-1]), float(math.sqrt(flt.var[-1]))


def dumps(obj: Any) -> str:
    return json.dumps(obj, allow_nan=False, separators=(",", ":"))
