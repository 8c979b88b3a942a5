"""Premium as a latent local level, tracked by a scalar Kalman filter.

Model (Durbin & Koopman 2012, ch. 2, with a known time-varying measurement-variance scale)::

    f[t]  = mu[t] + e[t],        e[t] ~ N(0, c * h[t])
    mu[t] = mu[t-1] + w[t],      w[t] ~ N(0, q)

``f`` is the factor return, ``mu`` its premium, ``h[t]`` the variance forecast for row ``t``
made before row ``t`` (see ``tracker.estimation.volatility``); ``q`` and ``c`` are estimated.

Initialisation: exact diffuse (Durbin & Koopman 2012, ch. 5) by default -- the first
observation sets ``mu`` to ``f`` with variance ``c * h`` and adds only the constant
``-log(2 pi) / 2`` to the log likelihood, exactly as statsmodels' exact diffuse filter does.  A stated weak prior is
``FilterState.weak_prior(mean, var)``: ``mu`` at the row *before* the first row is
``N(mean, var)``, so the first row is predicted with variance ``var + q``.

Rows where ``f`` or ``h`` is not finite, or ``h <= 0``, are missing: the state is predicted
through them without an update and they add nothing to the likelihood.

Real-time outputs come from ``filter_local_level`` only; ``smooth_hindsight`` uses the whole
sample and must never be shown as what was known at the time.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy.optimize import minimize, minimize_scalar

from tracker.estimation import jit

__all__ = [
    "LocalLevelParams",
    "FilterState",
    "FilteredPremium",
    "LocalLevelFit",
    "SmoothedPremium",
    "advance_state",
    "filter_local_level",
    "fit_local_level",
    "smooth_hindsight",
]

_LOG_2PI = math.log(2.0 * math.pi)
# bounds of log(q / (c * mean h)); below the floor the premium is constant for any usable T
_LOG_SNR_BOUNDS = (-40.0, 12.0)
_LOG_C_BOUNDS = (-25.0, 25.0)
_GRID_STEP = 4.0
_FLAT_LOGLIK = 1e-7  # log-likelihood gain too small to tell q from zero
_WARM_HALF_WIDTH = 1.0


def _float_or_none(x: float) -> float | None:
    return None if not np.isfinite(x) else float(x)


def _none_to_nan(x: float | None) -> float:
    return float("nan") if x is None else float(x)


@dataclass(frozen=True)
class LocalLevelParams:
    """Parameters of the local-level premium model.

    Attributes
    ----------
    q : float
        Variance of the daily premium innovation ``w[t]`` (squared return units).
    c : float
        Scale of the measurement variance: ``Var(e[t]) = c * h[t]`` (1 when ``h`` is right).
    """

    q: float
    c: float

    def __post_init__(self) -> None:
        # NaN is allowed: failed fits carry NaN parameters
        if self.q < 0.0 or self.c <= 0.0:
            raise ValueError("need q >= 0 and c > 0")

    def snr(self, h) -> np.ndarray:
        """Signal-to-noise ratio ``q / (c * h[t])``, shape of ``h``."""
        with np.errstate(divide="ignore", invalid="ignore"):
            return self.q / (self.c * np.asarray(h, dtype=float))

    def to_dict(self) -> dict:
        return {"q": _float_or_none(self.q), "c": _float_or_none(self.c)}

    @classmethod
    def from_dict(cls, d: dict) -> LocalLevelParams:
        return cls(q=_none_to_nan(d["q"]), c=_none_to_nan(d["c"]))


@dataclass(frozen=True)
class FilterState:
    """Filtered premium after the last processed row; the start of the next block.

    Attributes
    ----------
    mean, var : float
        ``mu[t|t]`` and ``P[t|t]`` of the last processed row (NaN while diffuse).
    n_rows : int
        Rows processed so far, missing ones included.
    n_obs : int
        Valid observations processed so far.
    diffuse : bool
        True while no observation has been seen under the exact diffuse start.
    """

    mean: float = float("nan")
    var: float = float("nan")
    n_rows: int = 0
    n_obs: int = 0
    diffuse: bool = True

    @classmethod
    def exact_diffuse(cls) -> FilterState:
        return cls()

    @classmethod
    def weak_prior(cls, mean: float, var: float) -> FilterState:
        """Stated prior ``mu ~ N(mean, var)`` for the row before the first row."""
        if not (np.isfinite(mean) and np.isfinite(var) and var >= 0.0):
            raise ValueError("a weak prior needs a finite mean and a finite variance >= 0")
        return cls(mean=float(mean), var=float(var), diffuse=False)

    def to_dict(self) -> dict:
        return {"mean": _float_or_none(self.mean), "var": _float_or_none(self.var),
                "n_rows": int(self.n_rows), "n_obs": int(self.n_obs),
                "diffuse": bool(self.diffuse)}

    @classmethod
    def from_dict(cls, d: dict) -> FilterState:
        return cls(mean=_none_to_nan(d["mean"]), var=_none_to_nan(d["var"]),
                   n_rows=int(d["n_rows"]), n_obs=int(d["n_obs"]), diffuse=bool(d["diffuse"]))


@dataclass(frozen=True)
class FilteredPremium:
    """Real-time (filtered) premium for a block of T rows.

    Attributes
    ----------
    mean, var : ndarray, shape (T,)
        ``mu[t|t]``, ``P[t|t]``: premium given rows up to ``t`` (NaN before the first
        observation under the diffuse start).
    forecast, forecast_var : ndarray, shape (T,)
        Forecast of ``f[t+1]`` made at ``t`` and its variance ``P[t|t] + q + c * h[t+1]``
        (the last row uses ``h_next``; NaN if not given).  The premium's own forecast
        variance is ``var + q``.
    std_error : ndarray, shape (T,)
        Standardised one-step prediction errors ``v[t] / sqrt(F[t])`` (NaN for missing rows
        and the diffuse first observation).
    loglik_t : ndarray, shape (T,)
        Log-likelihood contributions; NaN for missing rows; the diffuse first observation
        contributes only the constant ``-log(2 pi) / 2``.
    snr : ndarray, shape (T,)
        Signal-to-noise ratio ``q / (c * h[t])``.
    loglik : float
        Sum of the finite ``loglik_t``.
    nobs : int
        Valid observations in this block (likelihood terms, the diffuse one included).
    end_state : FilterState
        State after the last row; pass it to continue filtering.
    """

    mean: np.ndarray
    var: np.ndarray
    forecast: np.ndarray
    forecast_var: np.ndarray
    std_error: np.ndarray
    loglik_t: np.ndarray
    snr: np.ndarray
    loglik: float
    nobs: int
    end_state: FilterState


@dataclass(frozen=True)
class SmoothedPremium:
    """HINDSIGHT premium: uses rows after ``t``; never a real-time estimate.

    Attributes
    ----------
    mean, var : ndarray, shape (T,)
        ``mu[t|T]`` and its variance (Rauch-Tung-Striebel smoother).
    """

    mean: np.ndarray
    var: np.ndarray


@dataclass(frozen=True)
class LocalLevelFit:
    """Maximum-likelihood estimate of ``(q, c)``.

    Attributes
    ----------
    params : LocalLevelParams
        Estimates (NaN unless ``status == 'ok'``).
    loglik : float
        Maximised log likelihood.
    converged : bool
        Optimizer success.
    status : str
        'ok', 'not_converged', 'unidentified', 'too_little_data' or 'failed'.
    message : str
        Plain-words explanation.
    n_iter : int
        Likelihood evaluations used.
    filtered : FilteredPremium or None
        Filter at the estimates over the fitted rows (None unless 'ok').
    """

    params: LocalLevelParams
    loglik: float
    converged: bool
    status: str
    message: str
    n_iter: int
    filtered: FilteredPremium | None


# ---------------------------------------------------------------- kernel


def _inputs(y, h) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    y = np.asarray(y, dtype=float)
    h = np.asarray(h, dtype=float)
    if y.ndim != 1 or h.shape != y.shape:
        raise ValueError("y and h must be 1-D arrays of the same shape (T,)")
    with np.errstate(invalid="ignore"):
        # h = 0 would claim a noise-free return (stale data gives it): treated as missing
        valid = np.isfinite(y) & np.isfinite(h) & (h > 0.0)
    return y, h, valid


def _predict_pass(q: float, R: np.ndarray, y: np.ndarray, valid: np.ndarray,
                  state: FilterState) -> tuple[np.ndarray, np.ndarray, int, float, float]:
    """Predicted ``mu[t|t-1]``, ``P[t|t-1]`` for every row.

    Returns ``(a_pred, P_pred, first, a_end, P_end)`` where ``first`` is the row index of
    the diffuse first observation in this block (-1 if none); rows up to and including it
    carry NaN predictions.
    """
    n = y.size
    a_pred = np.full(n, np.nan)
    P_pred = np.full(n, np.nan)
    a, P = state.mean, state.var
    start, first = 0, -1
    if state.diffuse:
        idx = np.flatnonzero(valid)
        if idx.size == 0:
            return a_pred, P_pred, -1, a, P
        first = int(idx[0])
        a, P = float(y[first]), float(R[first])
        start = first + 1
    fn = _compiled_loop() if n - start >= jit.MIN_ROWS else None
    # a fit evaluates this pass dozens of times: compiled, ~5 ns a row; short blocks (a
    # day's update) run the same function in the interpreter
    a, P = (fn or _predict_loop)(float(q), np.ascontiguousarray(R[start:], dtype=np.float64),
                                 np.ascontiguousarray(y[start:], dtype=np.float64),
                                 np.ascontiguousarray(valid[start:], dtype=np.bool_),
                                 float(a), float(P), a_pred[start:], P_pred[start:])
    return a_pred, P_pred, first, a, P


def _predict_loop(q, R, y, valid, a, P, ap, Pp):
    """The recursion of :func:`_predict_pass` over arrays, compiled by numba for long blocks.

    Fills ``ap``/``Pp`` (views of the outputs) and returns the end ``(a, P)``.
    """
    for t in range(y.size):
        Pt = P + q
        ap[t] = a
        Pp[t] = Pt
        if valid[t]:
            F = Pt + R[t]
            a = a + Pt / F * (y[t] - a)
            P = Pt * R[t] / F
        else:
            P = Pt
    return a, P


def _compiled_loop():
    probe = (1e-8, np.ones(2), np.zeros(2), np.ones(2, dtype=np.bool_), 0.0, 1.0,
             np.empty(2), np.empty(2))
    return jit.compiled(_predict_loop, probe)


def _terms(a_pred, P_pred, R, y, use):
    """Prediction error ``v``, its variance ``F`` and log-likelihood terms on ``use`` rows."""
    F = np.where(use, P_pred + R, np.nan)
    v = np.where(use, y - a_pred, np.nan)
    ll = -0.5 * (_LOG_2PI + np.log(F) + v * v / F)
    return v, F, ll


def filter_local_level(params: LocalLevelParams, y, h, state: FilterState | None = None,
                       h_next: float | None = None) -> FilteredPremium:
    """Kalman filter of the local-level premium at fixed parameters.

    Parameters
    ----------
    params : LocalLevelParams
        ``q`` and ``c``.
    y : array_like, shape (T,)
        Factor returns ``f[t]`` (decimal).
    h : array_like, shape (T,)
        Variance forecasts ``h[t]`` made before row ``t``.
    state : FilterState, optional
        End state of the previous block (default: exact diffuse start).  Filtering two
        consecutive blocks this way gives the same numbers as one pass; cost is O(T).
    h_next : float, optional
        Variance forecast for the row after the block, for the last ``forecast_var``.

    Returns
    -------
    FilteredPremium
    """
    y, h, valid = _inputs(y, h)
    state = FilterState.exact_diffuse() if state is None else state
    q, c = float(params.q), float(params.c)
    R = c * h
    a_pred, P_pred, first, a_end, P_end = _predict_pass(q, R, y, valid, state)
    use = valid & np.isfinite(P_pred)
    v, F, ll = _terms(a_pred, P_pred, R, y, use)
    gain = P_pred / F
    mean = np.where(use, a_pred + gain * v, a_pred)
    var = np.where(use, P_pred * R / F, P_pred)
    if first >= 0:
        mean[first], var[first] = y[first], R[first]
        # exact diffuse term: only the constant remains since F_inf = 1 here (Durbin &
        # Koopman 2012, ch. 7, diffuse loglikelihood); statsmodels counts it the same way
        ll[first] = -0.5 * _LOG_2PI
        use = use.copy()
        use[first] = True
    h_ahead = np.append(h[1:], np.nan if h_next is None else float(h_next))
    end = _end_state(state, y, valid, first, a_end, P_end)
    return FilteredPremium(
        mean=mean, var=var, forecast=mean.copy(), forecast_var=var + q + c * h_ahead,
        std_error=v / np.sqrt(F), loglik_t=ll, snr=params.snr(h),
        loglik=float(ll[use].sum()), nobs=int(use.sum()), end_state=end)


def _end_state(state: FilterState, y, valid, first: int, a_end: float, P_end: float) -> FilterState:
    return FilterState(mean=float(a_end), var=float(P_end), n_rows=state.n_rows + y.size,
                       n_obs=state.n_obs + int(valid.sum()), diffuse=state.diffuse and first < 0)


def advance_state(params: LocalLevelParams, y, h, state: FilterState | None = None) -> FilterState:
    """The end state of :func:`filter_local_level` alone, without its per-row outputs.

    A daily update advances several extra filters by one row and needs only where they
    end; this skips the per-row arrays (most of the cost of a one-row block). The end
    state's ``mean`` is also the last filtered premium, unless the state is still diffuse
    (no observation yet), when the filter's last mean is NaN.
    """
    y, h, valid = _inputs(y, h)
    state = FilterState.exact_diffuse() if state is None else state
    _, _, first, a_end, P_end = _predict_pass(float(params.q), float(params.c) * h, y, valid, state)
    return _end_state(state, y, valid, first, a_end, P_end)


def smooth_hindsight(params: LocalLevelParams, y, h,
                     prior: FilterState | None = None) -> SmoothedPremium:
    """HINDSIGHT smoother (Rauch-Tung-Striebel): premium given the whole sample.

    Parameters
    ----------
    params : LocalLevelParams
    y, h : array_like, shape (T,)
    prior : FilterState, optional
        Start of the sample (default exact diffuse).

    Returns
    -------
    SmoothedPremium
        Uses future rows: for research plots only, never for real-time output.
    """
    flt = filter_local_level(params, y, h, state=prior)
    q = float(params.q)
    m, P = flt.mean.tolist(), flt.var.tolist()
    n = len(m)
    sm, sv = m[:], P[:]
    known = np.flatnonzero(np.isfinite(flt.var))
    if known.size == 0:
        return SmoothedPremium(mean=np.asarray(sm), var=np.asarray(sv))
    t0 = int(known[0])
    for t in range(n - 2, t0 - 1, -1):
        Pnext = P[t] + q
        J = P[t] / Pnext
        sm[t] = m[t] + J * (sm[t + 1] - m[t])
        sv[t] = P[t] + J * J * (sv[t + 1] - Pnext)
    # before the first observation the level only drifts back in time from it
    for t in range(t0):
        sm[t] = sm[t0]
        sv[t] = sv[t0] + (t0 - t) * q
    return SmoothedPremium(mean=np.asarray(sm), var=np.asarray(sv))


# ---------------------------------------------------------------- estimation


def _failed_fit(status: str, message: str, n_iter: int = 0) -> LocalLevelFit:
    nan = float("nan")
    return LocalLevelFit(LocalLevelParams(nan, nan), nan, False, status, message, n_iter, None)


def _profile(x: float, y, h, valid, h_bar) -> tuple[float, float]:
    """Diffuse log likelihood with ``c`` concentrated out (Durbin & Koopman 2012, ch. 2).

    ``x = log(q / (c * h_bar))``.  With an exact diffuse start every variance scales with
    ``c``, so ``c_hat = mean(v**2 / F*)`` where ``F*`` is computed at ``c = 1``.
    Returns ``(loglik, c_hat)``.
    """
    q_star = math.exp(x) * h_bar
    a_pred, P_pred, _, _, _ = _predict_pass(q_star, h, y, valid, FilterState.exact_diffuse())
    use = valid & np.isfinite(P_pred)
    F = P_pred[use] + h[use]
    v = y[use] - a_pred[use]
    n = F.size
    c_hat = float(np.mean(v * v / F))
    if not c_hat > 0.0:
        return -math.inf, c_hat
    return -0.5 * (n * (_LOG_2PI + 1.0 + math.log(c_hat)) + float(np.log(F).sum())), c_hat


def _fit_diffuse(y, h, valid, h_bar, start: LocalLevelParams | None):
    lo, hi = _LOG_SNR_BOUNDS
    n_eval = 0

    def neg(x: float) -> float:
        nonlocal n_eval
        n_eval += 1
        ll, _ = _profile(x, y, h, valid, h_bar)
        return -ll if np.isfinite(ll) else math.inf

    bracket = None
    if start is not None and start.q > 0 and start.c > 0:  # q = 0 has no log: use the grid
        x0 = min(max(math.log(start.q / (start.c * h_bar)), lo), hi)
        a, b = max(x0 - _WARM_HALF_WIDTH, lo), min(x0 + _WARM_HALF_WIDTH, hi)
        f0 = neg(x0)
        # the warm start is kept only if it brackets a minimum (or sits on a bound)
        if (a == x0 or f0 <= neg(a)) and (b == x0 or f0 <= neg(b)):
            bracket = (a, b)
    if bracket is None:
        grid = np.arange(lo, hi + 1e-9, _GRID_STEP)
        vals = [neg(float(g)) for g in grid]
        k = int(np.argmin(vals))
        bracket = (float(grid[max(k - 1, 0)]), float(grid[min(k + 1, grid.size - 1)]))
    res = minimize_scalar(neg, bounds=bracket, method="bounded",
                          options={"xatol": 1e-9, "maxiter": 500})
    x = float(res.x)
    # a likelihood flat down to the floor means q = 0 (constant premium) is the estimate
    at_floor = neg(lo) <= float(res.fun) + _FLAT_LOGLIK
    ll, c_hat = _profile(lo if at_floor else x, y, h, valid, h_bar)
    q = 0.0 if at_floor else math.exp(x) * h_bar * c_hat
    return LocalLevelParams(q=q, c=c_hat), ll, bool(res.success), str(res.message), n_eval, \
        at_floor


def _fit_prior(y, h, valid, h_bar, prior: FilterState, start: LocalLevelParams):
    n_eval = 0

    def neg(theta: np.ndarray) -> float:
        nonlocal n_eval
        n_eval += 1
        p = LocalLevelParams(q=math.exp(theta[0]) * h_bar, c=math.exp(theta[1]))
        R = p.c * h
        a_pred, P_pred, _, _, _ = _predict_pass(p.q, R, y, valid, prior)
        _, _, ll = _terms(a_pred, P_pred, R, y, valid)
        total = float(ll[valid].sum())
        # per-observation scale keeps the gradient tolerance meaningful for any T
        return -total / max(int(valid.sum()), 1) if np.isfinite(total) else 1e300

    lo, hi = _LOG_SNR_BOUNDS
    x0 = np.array([min(max(math.log(max(start.q / h_bar, math.exp(lo))), lo), hi),
                   math.log(start.c)])
    res = minimize(neg, x0, method="L-BFGS-B", bounds=[_LOG_SNR_BOUNDS, _LOG_C_BOUNDS],
                   options={"ftol": 1e-15, "gtol": 1e-9, "maxiter": 500})
    n_valid = int(valid.sum())
    at_floor = neg(np.array([_LOG_SNR_BOUNDS[0], res.x[1]])) * n_valid <= \
        float(res.fun) * n_valid + _FLAT_LOGLIK
    params = LocalLevelParams(q=0.0 if at_floor else math.exp(res.x[0]) * h_bar,
                              c=math.exp(res.x[1]))
    return params, -float(res.fun) * n_valid, bool(res.success), str(res.message), n_eval, \
        at_floor


def fit_local_level(y, h, prior: FilterState | None = None,
                    start: LocalLevelParams | None = None, min_obs: int = 30) -> LocalLevelFit:
    """Maximum-likelihood estimate of ``(q, c)``.

    Parameters
    ----------
    y, h : array_like, shape (T,)
        Factor returns and their variance forecasts (see ``filter_local_level``).
    prior : FilterState, optional
        None (default) = exact diffuse start.  Then ``c`` is concentrated out and
        ``log(q / (c * mean h))`` is found by bounded Brent search, bracketed either around
        ``start`` or by a coarse grid.  With a weak prior both ``log q`` and ``log c`` are
        searched by L-BFGS-B from ``start`` (or from the diffuse estimate).
    start : LocalLevelParams, optional
        Previous estimates, used as a warm start.
    min_obs : int
        Fewer valid observations give status 'too_little_data'.

    Returns
    -------
    LocalLevelFit
    """
    y, h, valid = _inputs(y, h)
    n_valid = int(valid.sum())
    if n_valid < max(min_obs, 3):
        return _failed_fit("too_little_data",
                           f"{n_valid} usable rows; the premium model needs at least "
                           f"{max(min_obs, 3)}.")
    h_bar = float(np.mean(h[valid]))
    if not h_bar > 0.0:
        return _failed_fit("unidentified", "The variance forecasts are all zero.")
    if np.ptp(y[valid]) == 0.0:
        return _failed_fit("unidentified", "The returns are constant; there is no noise to "
                                           "separate from the premium.")
    try:
        if prior is None or prior.diffuse:
            params, ll, ok, msg, n_eval, at_floor = _fit_diffuse(y, h, valid, h_bar, start)
        else:
            if start is None or not (start.q >= 0 and start.c > 0):
                start = _fit_diffuse(y, h, valid, h_bar, None)[0]
            params, ll, ok, msg, n_eval, at_floor = _fit_prior(y, h, valid, h_bar, prior, start)
    except (ValueError, FloatingPointError, OverflowError) as exc:
        return _failed_fit("failed", f"Likelihood evaluation failed: {exc}")
    if not np.isfinite(ll) or not (np.isfinite(params.q) and np.isfinite(params.c)):
        return _failed_fit("failed", "The likelihood is not finite at the optimum.", n_eval)
    if not ok:
        return _failed_fit("not_converged", f"Optimizer stopped: {msg}", n_eval)
    message = "Estimated by maximum likelihood."
    if at_floor:
        message += " q = 0: the likelihood is flat down to its floor, so the premium is " \
                   "estimated as constant."
    flt = filter_local_level(params, y, h, state=prior)
    return LocalLevelFit(params, flt.loglik, True, "ok", message, n_eval, flt)
