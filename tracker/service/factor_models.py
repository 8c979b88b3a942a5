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

import math
import time
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import orjson

from tracker.estimation.kim_filter import KimParams, KimState, filter_kim, fit_kim
from tracker.estimation.local_level import (
    FilterState,
    LocalLevelParams,
    advance_state,
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

# Extra filter states kept beside the models' own, so the latest-date warnings of an
# advance cost O(new rows): the premium refiltered with q halved and doubled (FRAGILE)
# and the last HINDSIGHT_ROWS rows with the filter state before them (HINDSIGHT_GAP: the
# smoother over the whole history, restricted to its last rows, only needs those).
STATE_Q_HALF = "premium_q_half"
STATE_Q_DOUBLE = "premium_q_double"
STATE_TAIL = "premium_tail"
HINDSIGHT_ROWS = 21


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
    # latest-date inputs from the extra states: q_half, q_double (last filtered premium
    # with q scaled) and hindsight (smoothed premium of the last HINDSIGHT_ROWS rows);
    # empty when the saved state lacks them (a store estimated before they existed)
    extras: dict = field(default_factory=dict)
    timings: dict = field(default_factory=dict)   # model -> seconds spent in this task
    dated_warnings: list | None = None            # per-date warning rows, when the worker made them


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
    timings: dict[str, float] = {}
    clock = time.perf_counter()

    def lap(model: str) -> None:
        nonlocal clock
        now = time.perf_counter()
        timings[model] = now - clock
        clock = now

    # 1. volatility
    if task.refit or MODEL_VOL not in params:
        rec, params[MODEL_VOL] = _vol_fit(task, y)
        fits.append(rec)
    vf = _vol_filter(params[MODEL_VOL], y, states.get(MODEL_VOL))
    h = usable_variance(vf) if vf is not None else _nan(n)
    h_next = vf.state.h_next if vf is not None else float("nan")
    if vf is not None:
        states[MODEL_VOL] = vf.state.to_dict()
    lap(MODEL_VOL)

    # 2. premium (local level)
    prev_ll = LocalLevelParams.from_dict(params[MODEL_PREMIUM]) if params.get(MODEL_PREMIUM) else None
    # Parameters are only ever estimated on a refit task (the whole history). An advance
    # never fits: a model without usable parameters stays without numbers until the
    # service schedules a refit (estimate._plan does when enough data has arrived).
    cold = bool(s.get("cold", False))     # a cold refit ignores the parameters in force as starts
    if task.refit:
        fit = fit_local_level(y, h, start=None if cold else prev_ll, min_obs=s["min_obs"])
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
    fresh = not states.get(MODEL_PREMIUM)          # filtering from the first row, not resuming
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
    lap(MODEL_PREMIUM)
    extras = _latest_extras(ll_params if vf is not None else None, y, h, states, fresh=fresh)
    lap("extras")

    # 3. regimes (Markov-switching mean and variance)
    prev_rp = RegimeParams.from_dict(params[MODEL_REGIMES]) if params.get(MODEL_REGIMES) else None
    if task.refit:
        model = MarkovRegimeModel(
            k_regimes=s["regimes"], n_starts=s["regime_starts"], seed=s["seed"],
        )
        finite = np.isfinite(y)
        rfit = model.fit(y[finite], previous=prev_rp, warm_start=not cold)   # labels kept either way
        fits.append(FitRecord(MODEL_REGIMES, rfit.status, rfit.message,
                              rfit.params.to_dict() if rfit.status == "ok" else {},
                              _finite_or_nan(rfit.loglik), int(finite.sum()), bool(rfit.converged)))
        params[MODEL_REGIMES] = rfit.params.to_dict() if rfit.status == "ok" else {}
        status[MODEL_REGIMES], message[MODEL_REGIMES] = rfit.status, rfit.message
    if task.refit or prev_rp is None:   # parsed once per task: an advance is ~1 ms, parsing counts
        rp = RegimeParams.from_dict(params[MODEL_REGIMES]) if params.get(MODEL_REGIMES) else None
    else:
        rp = prev_rp
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
    lap(MODEL_REGIMES)

    # 4. regime-aware premium (Kim filter), driven by the regime transition matrix
    prev_kp = KimParams.from_dict(params[MODEL_REGIME_PREMIUM]) if params.get(MODEL_REGIME_PREMIUM) else None
    if rp is not None and task.refit:
        start = prev_kp if (prev_kp is not None and not cold) else _kim_cold_start(y, h, ll_params, rp, regime_filtered)
        q_floor = drift_floor_q(y, task.frequency, s.get("premium_drift_floor", 0.0))
        # 'shared' (default): q is the plain local level's (after its floor), held fixed,
        # and the search is over the regime noise scales c only. The likelihood is nearly
        # flat in q (0.006 log-likelihood for a 20% change in a measured case), so a
        # second, free estimate of the same drift adds noise rather than information, and
        # a shared q keeps the two premium paths comparable; it also needs about half the
        # likelihood evaluations. 'free' estimates its own q, bounded by the floor.
        shared_q = ll_params.q if (s.get("regime_premium_q", "shared") == "shared"
                                   and ll_params is not None and math.isfinite(ll_params.q)
                                   and ll_params.q >= 0) else None
        kfit = fit_kim(y, h, np.asarray(rp.transition), start=start, min_obs=s["min_obs"],
                       q_min=q_floor if q_floor > 0 else None, fixed_q=shared_q)
        kfitted, floored = _apply_floor(kfit.params.to_dict() if kfit.status == "ok" and kfit.params else {}, q_floor)
        kmsg = kfit.message + (" q raised to the stated drift floor." if floored else "")
        fits.append(FitRecord(MODEL_REGIME_PREMIUM, kfit.status, kmsg, kfitted,
                              _finite_or_nan(kfit.loglik), int(np.isfinite(y).sum()), bool(kfit.converged)))
        params[MODEL_REGIME_PREMIUM] = kfitted
        status[MODEL_REGIME_PREMIUM], message[MODEL_REGIME_PREMIUM] = kfit.status, kmsg
    elif rp is None and task.refit:
        params[MODEL_REGIME_PREMIUM] = {}
    if rp is not None and not task.refit:
        kp = prev_kp
    else:
        kp = KimParams.from_dict(params[MODEL_REGIME_PREMIUM]) if params.get(MODEL_REGIME_PREMIUM) else None
    if kp is not None:
        st = KimState.from_dict(states[MODEL_REGIME_PREMIUM]) if states.get(MODEL_REGIME_PREMIUM) else None
        kf = filter_kim(kp, y, h, state=st, h_next=h_next)
        states[MODEL_REGIME_PREMIUM] = kf.end_state.to_dict()
        regime_premium, regime_premium_var = kf.mean, kf.var
    else:
        regime_premium = regime_premium_var = _nan(n)
    lap(MODEL_REGIME_PREMIUM)

    return FactorOutput(
        factor_id=task.factor_id, fits=tuple(fits), params=params, states=states,
        dates=np.asarray(task.dates), returns=y, premium=premium, premium_var=premium_var,
        forecast_var=forecast_var, vol_forecast=vol_forecast, std_error=std_error,
        loglik_t=loglik_t, snr=snr, regime_premium=regime_premium,
        regime_premium_var=regime_premium_var, regime_filtered=regime_filtered,
        regime_predicted=regime_predicted, status=status, message=message,
        extras=extras, timings=timings,
    )


def _kim_cold_start(y, h, ll_params, rp, regime_filtered) -> KimParams | None:
    """A first fit's start for the regime-aware premium, from the fits just made.

    ``c_j`` is the regime-weighted ratio of squared deviations to ``h`` (the measurement
    variance in regime j is ``c_j h_t``), with the regime model's filtered probabilities
    as weights; ``q`` is the plain local level's. From here the search needs a fraction
    of the likelihood evaluations it needs from the local-level ``c`` spread evenly.
    None (the fit's own default start) when an input is missing.
    """
    if ll_params is None or regime_filtered is None:
        return None
    ok = np.isfinite(y) & np.isfinite(h) & (h > 0) & np.all(np.isfinite(regime_filtered), axis=1)
    if ok.sum() < 10:
        return None
    e2 = (y[ok] - y[ok].mean()) ** 2
    w = regime_filtered[ok]
    denom = w.T @ h[ok]
    if not np.all(denom > 0):
        return None
    c = (w.T @ e2) / denom
    if not np.all(np.isfinite(c) & (c > 0)):
        return None
    return KimParams.create(ll_params.q, c, rp.transition)


def _latest_extras(ll_params: LocalLevelParams | None, y: np.ndarray, h: np.ndarray, states: dict,
                   *, fresh: bool) -> dict:
    """Advance the fragility and hindsight states by this block; return their latest values.

    With ``fresh`` (the block is the whole history) the states start from the
    exact diffuse start, as :func:`refiltered_premium` and :func:`hindsight_premium` do;
    otherwise they continue from the saved ones, and are dropped when the saved state
    has none (the service then recomputes them from the whole history).
    """
    keys = (STATE_Q_HALF, STATE_Q_DOUBLE, STATE_TAIL)
    if ll_params is None:
        # no premium parameters (or no usable variance): the whole-history versions give
        # NaN and no smoothed path; the marker says so without the history
        for k in keys:
            states[k] = {"unavailable": True}
        return {"q_half": float("nan"), "q_double": float("nan"), "hindsight": None}
    if y.size == 0 or (not fresh and not all(states.get(k) and not states[k].get("unavailable") for k in keys)):
        for k in keys:
            states.pop(k, None)
        return {}
    out = {}
    for key, scale in ((STATE_Q_HALF, 0.5), (STATE_Q_DOUBLE, 2.0)):
        p = LocalLevelParams(q=ll_params.q * scale, c=ll_params.c)
        st = None if fresh else FilterState.from_dict(states[key])
        end = advance_state(p, y, h, state=st)          # the last filtered premium is its mean
        states[key] = end.to_dict()
        out["q_half" if scale < 1 else "q_double"] = float("nan") if end.diffuse else end.mean
    tail = None if fresh else states[STATE_TAIL]
    prior = FilterState() if tail is None else FilterState.from_dict(tail["prior"])
    ty = np.concatenate([_floats(tail["y"]) if tail else np.empty(0), y])
    th = np.concatenate([_floats(tail["h"]) if tail else np.empty(0), h])
    drop = max(0, ty.size - HINDSIGHT_ROWS)
    if drop:
        # the rows leaving the tail only move the filter state before it
        prior = advance_state(ll_params, ty[:drop], th[:drop], state=prior)
        ty, th = ty[drop:], th[drop:]
    states[STATE_TAIL] = {"prior": prior.to_dict(), "y": _nullable(ty), "h": _nullable(th)}
    out["hindsight"] = smooth_hindsight(ll_params, ty, th, prior=prior).mean
    return out


def _floats(values: list) -> np.ndarray:
    return np.array([np.nan if v is None else v for v in values], dtype=float)


def _nullable(a: np.ndarray) -> list:
    return [float(v) if math.isfinite(v) else None for v in a]


def latest_extras_full(params: dict, returns: np.ndarray) -> tuple[dict, dict]:
    """The extras and their states from the whole history (a store that lacks them)."""
    returns = np.asarray(returns, float)
    vf = _vol_filter(params[MODEL_VOL], returns, None) if params.get(MODEL_VOL) is not None else None
    states: dict = {}
    ll = LocalLevelParams.from_dict(params[MODEL_PREMIUM]) if params.get(MODEL_PREMIUM) and vf is not None else None
    h = usable_variance(vf) if vf is not None else np.full(returns.size, np.nan)
    extras = _latest_extras(ll, returns, h, states, fresh=True)
    return extras, states


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
    """A filter state or fit's parameters as compact JSON; ValueError for a NaN or an
    infinity anywhere in it (JSON has none, and a state that lost one would be wrong).

    Encoded by orjson: a day's update writes ~500 states of ~12 KB, which the standard
    library's encoder took 0.15 ms each to write and orjson 0.008 ms (measured on the
    500-factor bench store); the values and the text read back are the same (twin:
    tests/service/test_factor_models.py). orjson writes a NaN as null, so the check
    that the standard library made with ``allow_nan=False`` is made here first.
    """
    _refuse_non_finite(obj)
    return orjson.dumps(obj, option=orjson.OPT_NON_STR_KEYS | orjson.OPT_SERIALIZE_NUMPY).decode()


def loads(text: str | bytes) -> Any:
    """:func:`dumps`'s JSON back as Python values (orjson: ~5x the standard library's speed)."""
    return orjson.loads(text)


def _refuse_non_finite(obj: Any) -> None:
    """ValueError when ``obj`` holds a NaN or an infinity at any depth (one pass, no
    recursion: a state holds ~150 values, mostly floats in lists)."""
    stack = [[obj]]
    while stack:
        node = stack.pop()
        for v in (node.values() if type(node) is dict else node):
            t = type(v)
            if t is float:
                if v - v != 0.0:                    # NaN or +-inf (finite: exactly 0)
                    raise ValueError(f"Out of range float values are not JSON compliant: {v!r}")
            elif t is list or t is dict or t is tuple:
                stack.append(v)
            elif t is str or t is int or t is bool or v is None:
                continue
            elif isinstance(v, (float, np.floating)):
                if not math.isfinite(v):
                    raise ValueError(f"Out of range float values are not JSON compliant: {v!r}")
            elif isinstance(v, (dict, list, tuple)):
                stack.append(v)
            elif isinstance(v, np.ndarray) and v.dtype.kind in "fc" and not np.isfinite(v).all():
                raise ValueError("Out of range float values are not JSON compliant: an array holds a NaN or infinity")
