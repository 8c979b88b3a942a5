"""Regime-aware premium: local level with Markov-switching measurement noise (Kim filter).

Model (Kim 1994; Kim & Nelson 1999, State-Space Models with Regime Switching, ch. 5)::

    f[t]  = mu[t] + m[S_t] + e[t],   e[t] ~ N(0, c[S_t] * h[t])
    mu[t] = mu[t-1] + w[t],          w[t] ~ N(0, q)

``S_t`` is a K-state Markov chain with a *given* transition matrix (from the regime model).

Transition convention used here: **row-stochastic**,
``transition[i][j] = P(S_t = j | S_{t-1} = i)`` (rows sum to 1; hmmlearn's ``transmat_``).
statsmodels ``MarkovRegression`` uses the transpose, ``P[i, j] = P(S_t = i | S_{t-1} = j)``
(columns sum to 1); convert with ``transition_from_statsmodels``.

The filter runs K x K Kalman updates per row (previous regime i -> current regime j) and
collapses them back to K by moment matching, Kim's approximation.  ``mu[t]`` is the premium in
regime 0 when the shifts follow the fitting convention ``m[0] = 0``; the premium in regime k is
``mu[t] + m[k]``.  With K = 1 the filter is exactly ``local_level.filter_local_level``.

Initialisation as in ``local_level``: exact diffuse by default (the first observation says
nothing about the regime and adds only ``-log(2 pi) / 2``), or a stated weak prior; the regime
of the row before the first row has the chain's stationary distribution unless given.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy.optimize import minimize

from tracker.estimation import kim_compiled
from tracker.estimation.local_level import (
    _FLAT_LOGLIK,
    _LOG_2PI,
    _LOG_C_BOUNDS,
    _LOG_SNR_BOUNDS,
    FilterState,
    _inputs,
    fit_local_level,
)

__all__ = [
    "KimParams",
    "KimState",
    "KimFiltered",
    "KimFit",
    "transition_from_statsmodels",
    "stationary_distribution",
    "filter_kim",
    "fit_kim",
]

_SHIFT_BOUND = 50.0  # |m_k| in units of sqrt(mean h)


def _list_or_none(x) -> list:
    return [None if not np.isfinite(v) else float(v) for v in np.asarray(x, dtype=float)]


def _nan_list(x) -> tuple[float, ...]:
    return tuple(float("nan") if v is None else float(v) for v in x)


def transition_from_statsmodels(p_sm) -> np.ndarray:
    """Convert statsmodels' column-stochastic matrix ``P[i, j] = P(S_t=i | S_{t-1}=j)``."""
    return np.ascontiguousarray(np.asarray(p_sm, dtype=float).T)


def stationary_distribution(transition) -> np.ndarray:
    """Stationary probabilities ``pi`` with ``pi @ transition = pi``, shape (K,)."""
    p = np.asarray(transition, dtype=float)
    k = p.shape[0]
    a = np.vstack((p.T - np.eye(k), np.ones((1, k))))
    b = np.zeros(k + 1)
    b[-1] = 1.0
    pi = np.linalg.lstsq(a, b, rcond=None)[0]
    pi = np.clip(pi, 0.0, None)
    return pi / pi.sum()


@dataclass(frozen=True)
class KimParams:
    """Parameters of the regime-switching local level.

    Attributes
    ----------
    q : float
        Premium innovation variance.
    c : tuple of float, length K
        Measurement-variance scale in each regime: ``Var(e[t] | S_t=k) = c[k] * h[t]``.
    m : tuple of float, length K
        Mean shift in each regime (zeros: no shift).
    transition : tuple of tuples, K x K
        Row-stochastic ``transition[i][j] = P(S_t = j | S_{t-1} = i)``.
    """

    q: float
    c: tuple[float, ...]
    m: tuple[float, ...]
    transition: tuple[tuple[float, ...], ...]

    def __post_init__(self) -> None:
        # plain Python: a daily update makes one of these per factor, and numpy's checks
        # cost more than the filter step it parametrises
        k = len(self.c)
        if len(self.m) != k or len(self.transition) != k or any(len(r) != k for r in self.transition):
            raise ValueError("c, m and transition must describe the same number of regimes")
        # rows sum to 1 within numpy allclose's default tolerance (atol 1e-8, rtol 1e-5)
        if (any(v < 0.0 for r in self.transition for v in r)
                or not all(abs(math.fsum(r) - 1.0) <= 1e-8 + 1e-5 for r in self.transition)):
            raise ValueError("transition must be row-stochastic: P[i][j] = P(S_t=j | S_t-1=i)")
        if not (self.q >= 0.0 and all(v > 0.0 for v in self.c)):
            raise ValueError("need q >= 0 and every c[k] > 0")

    @classmethod
    def create(cls, q: float, c, transition, m=None) -> KimParams:
        c = tuple(float(v) for v in np.atleast_1d(c))
        m = (0.0,) * len(c) if m is None else tuple(float(v) for v in np.atleast_1d(m))
        p = tuple(tuple(float(v) for v in row) for row in np.atleast_2d(transition))
        return cls(q=float(q), c=c, m=m, transition=p)

    @property
    def k_regimes(self) -> int:
        return len(self.c)

    def to_dict(self) -> dict:
        return {"q": float(self.q), "c": list(self.c), "m": list(self.m),
                "transition": [list(r) for r in self.transition]}

    @classmethod
    def from_dict(cls, d: dict) -> KimParams:
        return cls.create(d["q"], d["c"], d["transition"], d["m"])


@dataclass(frozen=True)
class KimState:
    """Filter state after the last processed row.

    Attributes
    ----------
    prob : tuple of float, length K
        ``P(S_t = k | data to t)`` of the last row (before any row: the start distribution
        of the regime of the row before the first row).
    mean, var : tuple of float, length K
        Premium mean and variance given the regime of the last row (NaN while diffuse).
    n_rows, n_obs : int
        Rows and valid observations processed so far.
    diffuse : bool
        True while no observation has been seen under the exact diffuse start.
    """

    prob: tuple[float, ...]
    mean: tuple[float, ...]
    var: tuple[float, ...]
    n_rows: int = 0
    n_obs: int = 0
    diffuse: bool = True

    @classmethod
    def initial(cls, params: KimParams, prior: FilterState | None = None,
                prob=None) -> KimState:
        """Start state: exact diffuse (default) or ``prior``; ``prob`` defaults to stationary."""
        k = params.k_regimes
        pi = stationary_distribution(params.transition) if prob is None else np.asarray(prob)
        prior = FilterState.exact_diffuse() if prior is None else prior
        return cls(prob=tuple(float(v) for v in pi), mean=(float(prior.mean),) * k,
                   var=(float(prior.var),) * k, diffuse=bool(prior.diffuse))

    def to_dict(self) -> dict:
        return {"prob": [float(v) for v in self.prob], "mean": _list_or_none(self.mean),
                "var": _list_or_none(self.var), "n_rows": int(self.n_rows),
                "n_obs": int(self.n_obs), "diffuse": bool(self.diffuse)}

    @classmethod
    def from_dict(cls, d: dict) -> KimState:
        return cls(prob=tuple(float(v) for v in d["prob"]), mean=_nan_list(d["mean"]),
                   var=_nan_list(d["var"]), n_rows=int(d["n_rows"]), n_obs=int(d["n_obs"]),
                   diffuse=bool(d["diffuse"]))


@dataclass(frozen=True)
class KimFiltered:
    """Real-time output of the Kim filter for a block of T rows, K regimes.

    Attributes
    ----------
    regime_prob : ndarray, shape (T, K)
        Filtered ``P(S_t = k | data to t)``.
    predicted_prob : ndarray, shape (T, K)
        ``P(S_{t+1} = k | data to t)`` = ``regime_prob @ transition``.
    regime_mean, regime_var : ndarray, shape (T, K)
        Premium ``mu[t]`` mean and variance given ``S_t = k`` and data to ``t``.
    mean, var : ndarray, shape (T,)
        Collapsed (regime-averaged) ``mu[t|t]`` and its variance.
    forecast, forecast_var : ndarray, shape (T,)
        Mean and variance of ``f[t+1]`` given data to ``t`` (last row needs ``h_next``).
    std_error : ndarray, shape (T,)
        ``(f[t] - forecast[t-1]) / sqrt(forecast_var[t-1])`` (NaN where undefined).
    loglik_t : ndarray, shape (T,)
        Log-likelihood contributions (NaN for missing rows).
    loglik : float
        Sum of the finite ``loglik_t``.
    nobs : int
        Valid observations in this block.
    end_state : KimState
        State after the last row.
    """

    regime_prob: np.ndarray
    predicted_prob: np.ndarray
    regime_mean: np.ndarray
    regime_var: np.ndarray
    mean: np.ndarray
    var: np.ndarray
    forecast: np.ndarray
    forecast_var: np.ndarray
    std_error: np.ndarray
    loglik_t: np.ndarray
    loglik: float
    nobs: int
    end_state: KimState


@dataclass(frozen=True)
class KimFit:
    """Maximum-likelihood estimate of ``q``, ``c`` (and ``m``) at a given transition matrix.

    Attributes
    ----------
    params : KimParams or None
        Estimates (None unless ``status == 'ok'``).
    loglik : float
        Maximised log likelihood (NaN on failure).
    converged : bool
    status : str
        'ok', 'not_converged', 'too_little_data' or 'failed'.
    message : str
    n_iter : int
        Likelihood evaluations used.
    filtered : KimFiltered or None
    """

    params: KimParams | None
    loglik: float
    converged: bool
    status: str
    message: str
    n_iter: int
    filtered: KimFiltered | None


# ---------------------------------------------------------------- kernel


def _kim_pass(params: KimParams, y: np.ndarray, h: np.ndarray, valid: np.ndarray,
              state: KimState):
    """Run the filter; returns flat per-row lists (prob, mean, var: T*K) and loglik_t (T).

    Plain Python floats in flat, reused lists: for K <= 4 the K*K scalar updates per row
    cost far less than numpy calls on tiny arrays.  Index ``i * k + j`` is the pair
    (previous regime i, current regime j).
    """
    k = params.k_regimes
    kk = k * k
    q = float(params.q)
    c, m = [float(v) for v in params.c], [float(v) for v in params.m]
    p = [float(v) for row in params.transition for v in row]
    rk = range(k)
    pairs = [(i, j, i * k + j) for j in rk for i in rk]
    prob, a, P = list(state.prob), list(state.mean), list(state.var)
    diffuse = state.diffuse
    n = y.size
    out_prob, out_mean, out_var = [0.0] * (n * k), [0.0] * (n * k), [0.0] * (n * k)
    out_ll = [math.nan] * n
    yl, hl, vl = y.tolist(), h.tolist(), valid.tolist()
    nan_k = [math.nan] * k
    log, exp, log_2pi = math.log, math.exp, _LOG_2PI
    pw, e, aij, Pij = [0.0] * kk, [0.0] * kk, [0.0] * kk, [0.0] * kk
    Pt, d, R = [0.0] * k, [0.0] * k, [0.0] * k
    for t in range(n):
        for i, j, ij in pairs:
            pw[ij] = prob[i] * p[ij]  # P(S_{t-1}=i, S_t=j | data to t-1)
        if diffuse:
            prob = [sum(pw[i * k + j] for i in rk) for j in rk]
            if vl[t]:
                # diffuse level: the first observation is equally likely under every regime
                yt, ht = yl[t], hl[t]
                a = [yt - m[j] for j in rk]
                P = [c[j] * ht for j in rk]
                diffuse = False
                out_ll[t] = -0.5 * log_2pi
        elif not vl[t]:
            for i in rk:
                Pt[i] = P[i] + q
            prob, a, P = _collapse(pw, [a[i] for i in rk for _ in rk],
                                   [Pt[i] for i in rk for _ in rk], prob, k)
        else:
            yt, ht = yl[t], hl[t]
            for i in rk:
                Pt[i] = P[i] + q
                d[i] = yt - a[i]
            for j in rk:
                R[j] = c[j] * ht
            emax = -math.inf
            for i, j, ij in pairs:
                Pti = Pt[i]
                F = Pti + R[j]
                v = d[i] - m[j]
                eij = -0.5 * (log_2pi + log(F) + v * v / F)
                e[ij] = eij
                aij[ij] = a[i] + Pti / F * v
                Pij[ij] = Pti * R[j] / F
                if eij > emax and pw[ij] > 0.0:
                    emax = eij
            for ij in range(kk):
                pw[ij] = pw[ij] * exp(e[ij] - emax) if pw[ij] > 0.0 else 0.0
            tot = sum(pw)
            out_ll[t] = emax + log(tot)
            prob, a, P = _collapse(pw, aij, Pij, prob, k)
        base = t * k
        out_prob[base:base + k] = prob
        out_mean[base:base + k] = nan_k if diffuse else a
        out_var[base:base + k] = nan_k if diffuse else P
    return out_prob, out_mean, out_var, out_ll, (prob, a, P, diffuse)


def _kim_pass_two(params: KimParams, y: np.ndarray, h: np.ndarray, valid: np.ndarray,
                  state: KimState):
    """``_kim_pass`` unrolled for K = 2, the common calm/turbulent case (about 4x faster).

    Same operations in the same order as the general kernel, so the two agree to the last
    bit; the general kernel is its reference twin in the tests.
    """
    q = float(params.q)
    c0, c1 = (float(v) for v in params.c)
    m0, m1 = (float(v) for v in params.m)
    (p00, p01), (p10, p11) = ((float(v) for v in row) for row in params.transition)
    pr0, pr1 = (float(v) for v in state.prob)
    a0, a1 = (float(v) for v in state.mean)
    P0, P1 = (float(v) for v in state.var)
    diffuse = state.diffuse
    n = y.size
    out_prob, out_mean, out_var = [0.0] * (2 * n), [0.0] * (2 * n), [0.0] * (2 * n)
    out_ll = [math.nan] * n
    yl, hl, vl = y.tolist(), h.tolist(), valid.tolist()
    log, exp, log_2pi, nan = math.log, math.exp, _LOG_2PI, math.nan
    for t in range(n):
        w00, w01, w10, w11 = pr0 * p00, pr0 * p01, pr1 * p10, pr1 * p11
        if diffuse:
            pr0, pr1 = w00 + w10, w01 + w11
            if vl[t]:
                yt, ht = yl[t], hl[t]
                a0, a1 = yt - m0, yt - m1
                P0, P1 = c0 * ht, c1 * ht
                diffuse = False
                out_ll[t] = -0.5 * log_2pi
            else:
                out_prob[2 * t], out_prob[2 * t + 1] = pr0, pr1
                out_mean[2 * t] = out_mean[2 * t + 1] = nan
                out_var[2 * t] = out_var[2 * t + 1] = nan
                continue
        elif not vl[t]:
            Pt0, Pt1 = P0 + q, P1 + q
            b00 = b01 = a0
            b10 = b11 = a1
            Q00 = Q01 = Pt0
            Q10 = Q11 = Pt1
            pr0, pr1, a0, a1, P0, P1 = _collapse_two(w00, w01, w10, w11, b00, b01, b10, b11,
                                                     Q00, Q01, Q10, Q11, pr0, pr1)
        else:
            yt, ht = yl[t], hl[t]
            Pt0, Pt1 = P0 + q, P1 + q
            d0, d1 = yt - a0, yt - a1
            R0, R1 = c0 * ht, c1 * ht
            F = Pt0 + R0
            v = d0 - m0
            e00 = -0.5 * (log_2pi + log(F) + v * v / F)
            b00 = a0 + Pt0 / F * v
            Q00 = Pt0 * R0 / F
            F = Pt1 + R0
            v = d1 - m0
            e10 = -0.5 * (log_2pi + log(F) + v * v / F)
            b10 = a1 + Pt1 / F * v
            Q10 = Pt1 * R0 / F
            F = Pt0 + R1
            v = d0 - m1
            e01 = -0.5 * (log_2pi + log(F) + v * v / F)
            b01 = a0 + Pt0 / F * v
            Q01 = Pt0 * R1 / F
            F = Pt1 + R1
            v = d1 - m1
            e11 = -0.5 * (log_2pi + log(F) + v * v / F)
            b11 = a1 + Pt1 / F * v
            Q11 = Pt1 * R1 / F
            emax = -math.inf
            if e00 > emax and w00 > 0.0:
                emax = e00
            if e10 > emax and w10 > 0.0:
                emax = e10
            if e01 > emax and w01 > 0.0:
                emax = e01
            if e11 > emax and w11 > 0.0:
                emax = e11
            w00 = w00 * exp(e00 - emax) if w00 > 0.0 else 0.0
            w01 = w01 * exp(e01 - emax) if w01 > 0.0 else 0.0
            w10 = w10 * exp(e10 - emax) if w10 > 0.0 else 0.0
            w11 = w11 * exp(e11 - emax) if w11 > 0.0 else 0.0
            out_ll[t] = emax + log(w00 + w01 + w10 + w11)
            pr0, pr1, a0, a1, P0, P1 = _collapse_two(w00, w01, w10, w11, b00, b01, b10, b11,
                                                     Q00, Q01, Q10, Q11, pr0, pr1)
        out_prob[2 * t], out_prob[2 * t + 1] = pr0, pr1
        out_mean[2 * t], out_mean[2 * t + 1] = a0, a1
        out_var[2 * t], out_var[2 * t + 1] = P0, P1
    end = ([pr0, pr1], [a0, a1], [P0, P1], diffuse)
    return out_prob, out_mean, out_var, out_ll, end


def _collapse_two(w00, w01, w10, w11, b00, b01, b10, b11, Q00, Q01, Q10, Q11, pr0, pr1):
    """``_collapse`` for K = 2 with the same operation order."""
    tot = w00 + w01 + w10 + w11
    s = w00 + w10
    u0, u1 = (w00 / s, w10 / s) if s > 0.0 else (pr0, pr1)
    n_a0 = u0 * b00 + u1 * b10
    dv0, dv1 = b00 - n_a0, b10 - n_a0
    n_P0 = u0 * (Q00 + dv0 * dv0) + u1 * (Q10 + dv1 * dv1)
    n_pr0 = s / tot
    s = w01 + w11
    u0, u1 = (w01 / s, w11 / s) if s > 0.0 else (pr0, pr1)
    n_a1 = u0 * b01 + u1 * b11
    dv0, dv1 = b01 - n_a1, b11 - n_a1
    n_P1 = u0 * (Q01 + dv0 * dv0) + u1 * (Q11 + dv1 * dv1)
    return n_pr0, s / tot, n_a0, n_a1, n_P0, n_P1


def _collapse(w: list, aij: list, Pij: list, prob: list, k: int):
    """Kim's collapse K*K -> K by moment matching over the previous regime.

    ``w[i*k+j]`` are unnormalised joint weights of (previous i, current j); a current regime
    with zero weight keeps the previous probabilities as mixing weights so its moments stay
    finite.  Returns (probabilities, means, variances) of the current regime.
    """
    rk = range(k)
    tot = sum(w)
    new_prob, new_a, new_P = [0.0] * k, [0.0] * k, [0.0] * k
    for j in rk:
        s = 0.0
        for i in rk:
            s += w[i * k + j]
        if s > 0.0:
            wj = [w[i * k + j] / s for i in rk]
        else:
            wj = prob
        mj = 0.0
        for i in rk:
            mj += wj[i] * aij[i * k + j]
        vj = 0.0
        for i in rk:
            dev = aij[i * k + j] - mj
            vj += wj[i] * (Pij[i * k + j] + dev * dev)
        new_prob[j] = s / tot
        new_a[j] = mj
        new_P[j] = vj
    return new_prob, new_a, new_P


def _run(params: KimParams, y, h, valid, state: KimState):
    if params.k_regimes == 2:
        if y.size >= kim_compiled.MIN_ROWS:       # a whole history: the compiled twin
            out = kim_compiled.pass_two(params, y, h, valid, state)
            if out is not None:
                return out[:5]
        return _kim_pass_two(params, y, h, valid, state)
    return _kim_pass(params, y, h, valid, state)


def _predictive(prob, mean, var, params: KimParams, h_ahead):
    """Mean and variance of ``f`` one row ahead from per-regime states; inputs (N, K), (N,)."""
    p = np.asarray(params.transition, dtype=float)
    c, m = np.asarray(params.c), np.asarray(params.m)
    w = prob[:, :, None] * p[None, :, :]                       # (N, i, j)
    mu = mean[:, :, None] + m[None, None, :]
    v = var[:, :, None] + params.q + c[None, None, :] * h_ahead[:, None, None]
    fm = np.einsum("nij,nij->n", w, mu)
    fv = np.einsum("nij,nij->n", w, v + (mu - fm[:, None, None]) ** 2)
    return fm, fv


def filter_kim(params: KimParams, y, h, state: KimState | None = None,
               h_next: float | None = None) -> KimFiltered:
    """Kim filter at fixed parameters.

    Parameters
    ----------
    params : KimParams
    y : array_like, shape (T,)
        Factor returns (decimal); non-finite rows are missing.
    h : array_like, shape (T,)
        Variance forecasts made before each row (``tracker.estimation.volatility``).
    state : KimState, optional
        End state of the previous block (default ``KimState.initial(params)``: exact diffuse,
        stationary regime probabilities).  Two consecutive blocks give the one-pass result.
    h_next : float, optional
        Variance forecast for the row after the block (for the last forecast variance).

    Returns
    -------
    KimFiltered
    """
    y, h, valid = _inputs(y, h)
    state = KimState.initial(params) if state is None else state
    k, n = params.k_regimes, y.size
    out_prob, out_mean, out_var, out_ll, end = _run(params, y, h, valid, state)
    prob = np.asarray(out_prob).reshape(n, k)
    rmean = np.asarray(out_mean).reshape(n, k)
    rvar = np.asarray(out_var).reshape(n, k)
    ll = np.asarray(out_ll)
    mean = np.einsum("nk,nk->n", prob, rmean)
    var = np.einsum("nk,nk->n", prob, rvar + (rmean - mean[:, None]) ** 2)
    # per-regime states before each row (the start state first) give one-row-ahead moments
    prev = [np.vstack((np.asarray(s, dtype=float)[None, :], arr))
            for s, arr in ((state.prob, prob), (state.mean, rmean), (state.var, rvar))]
    h_ahead = np.append(h, np.nan if h_next is None else float(h_next))
    fm, fv = _predictive(prev[0], prev[1], prev[2], params, h_ahead)
    std_error = np.where(valid, (y - fm[:-1]) / np.sqrt(fv[:-1]), np.nan)
    e_prob, e_mean, e_var, e_diffuse = end
    end_state = KimState(prob=tuple(e_prob), mean=tuple(float(v) for v in e_mean),
                         var=tuple(float(v) for v in e_var), n_rows=state.n_rows + n,
                         n_obs=state.n_obs + int(valid.sum()), diffuse=e_diffuse)
    finite = np.isfinite(ll)
    return KimFiltered(
        regime_prob=prob, predicted_prob=prob @ np.asarray(params.transition, dtype=float),
        regime_mean=rmean, regime_var=rvar, mean=mean, var=var,
        forecast=fm[1:], forecast_var=fv[1:], std_error=std_error, loglik_t=ll,
        loglik=float(ll[finite].sum()), nobs=int(valid.sum()), end_state=end_state)


# ---------------------------------------------------------------- estimation


def _failed(status: str, message: str, n_iter: int = 0) -> KimFit:
    return KimFit(None, float("nan"), False, status, message, n_iter, None)


def fit_kim(y, h, transition, mean_shift: bool = False, fixed_q: float | None = None,
            prior: FilterState | None = None, start: KimParams | None = None,
            initial_prob=None, min_obs: int = 60, q_min: float | None = None) -> KimFit:
    """Maximum likelihood of ``q``, ``c[0..K-1]`` (and ``m[1..K-1]``) at a given transition.

    The transition matrix is taken from the regime model and held fixed, so regime labels
    are the regime model's.  ``m[0] = 0`` identifies the level: ``mu`` is the regime-0
    premium.  Search: L-BFGS-B over ``log(q / mean h)``, ``log c[k]`` and
    ``m[k] / sqrt(mean h)``, started at ``start`` (warm start) or at the plain local-level
    estimate with ``c`` spread around it (regime 0 lowest, following the volatility order).

    Parameters
    ----------
    y, h : array_like, shape (T,)
    transition : array_like, shape (K, K)
        Row-stochastic ``P(S_t = j | S_{t-1} = i)``.
    mean_shift : bool
        Estimate regime mean shifts ``m[1..K-1]`` too.
    fixed_q : float, optional
        Hold ``q`` at this value (e.g. the plain local-level estimate) and estimate only
        the regime parameters: fewer dimensions, a faster search.
    prior : FilterState, optional
        Exact diffuse (default) or a weak prior.
    start : KimParams, optional
        Warm start (its transition is ignored).
    initial_prob : array_like, shape (K,), optional
        Regime distribution of the row before the first (default stationary).
    min_obs : int
        Fewer valid observations give 'too_little_data'.
    q_min : float, optional
        A lower bound on ``q`` (a stated prior floor on the drift): the estimate is the
        likelihood's maximum subject to it, so ``c`` is estimated at the ``q`` used.
        Where the unconstrained maximum lies below the floor (the common case for a
        slow drift) the search ends on the bound in a few steps.

    Returns
    -------
    KimFit
    """
    y, h, valid = _inputs(y, h)
    p = np.atleast_2d(np.asarray(transition, dtype=float))
    k = p.shape[0]
    n_valid = int(valid.sum())
    if n_valid < max(min_obs, 3):
        return _failed("too_little_data", f"{n_valid} usable rows; the regime premium model "
                                          f"needs at least {max(min_obs, 3)}.")
    h_bar = float(np.mean(h[valid]))
    if not h_bar > 0.0 or np.ptp(y[valid]) == 0.0:
        return _failed("failed", "The returns or their variance forecasts are constant.")
    if start is None:
        base = fit_local_level(y, h, prior=prior, min_obs=min_obs)
        if base.status != "ok":
            return _failed("failed", f"No starting values: {base.message}")
        spread = np.exp(np.linspace(-0.5, 0.5, k)) if k > 1 else np.ones(1)
        start = KimParams.create(base.params.q, base.params.c * spread, p)
    free_q = fixed_q is None
    n_shift = k - 1 if mean_shift else 0
    scale = math.sqrt(h_bar)
    # Below q / h ~ 1 / T**2 the drift over the whole sample is smaller than the noise of
    # its mean and the likelihood is flat in q: the search starts no lower than that edge
    # and stops 1e-4 below it (a flat likelihood down there is reported as q = 0).
    lo = max(_LOG_SNR_BOUNDS[0], math.log(1e-4 / n_valid**2))
    hi = _LOG_SNR_BOUNDS[1]
    floored = q_min is not None and q_min > 0 and math.log(q_min / h_bar) > lo
    if free_q and floored and math.log(q_min / h_bar) >= hi:
        # the floor is above the search range: q is the floor, only the c are searched
        fixed_q, floored = float(q_min), False
        free_q = False
    elif floored:
        lo = math.log(q_min / h_bar)
    x0 = np.concatenate((
        [min(max(math.log(max(start.q / h_bar, 1.0 / n_valid**2)), lo), hi)] if free_q else [],
        np.clip(np.log(np.maximum(np.asarray(start.c), 1e-300)), *_LOG_C_BOUNDS),
        (np.asarray(start.m[1:]) - start.m[0]) / scale if n_shift else [],
    ))
    bounds = ([(lo, hi)] if free_q else []) + [_LOG_C_BOUNDS] * k \
        + [(-_SHIFT_BOUND, _SHIFT_BOUND)] * n_shift
    i_c = 1 if free_q else 0

    def unpack(x: np.ndarray) -> KimParams:
        m = np.zeros(k)
        m[1:] = x[i_c + k:] * scale if n_shift else 0.0
        q = math.exp(x[0]) * h_bar if free_q else float(fixed_q)
        return KimParams.create(q, np.exp(x[i_c:i_c + k]), p, m)

    n_eval = 0

    def neg(x: np.ndarray) -> float:
        nonlocal n_eval
        n_eval += 1
        par = unpack(x)
        st = KimState.initial(par, prior=prior, prob=initial_prob)
        if k == 2:   # compiled twin of _kim_pass_two's likelihood (tracker.estimation.kim_compiled)
            total = kim_compiled.loglik_two(par, y, h, valid, st)
        else:
            ll = _run(par, y, h, valid, st)[3]
            total = math.fsum(v for v in ll if v == v)
        # per-observation scale keeps the gradient tolerance meaningful for any T
        return -total / n_valid if math.isfinite(total) else 1e300

    try:
        res = minimize(neg, x0, method="L-BFGS-B", bounds=bounds,
                       options={"ftol": 1e-11, "gtol": 1e-6, "maxiter": 500})
    except (ValueError, FloatingPointError, OverflowError) as exc:
        return _failed("failed", f"Likelihood evaluation failed: {exc}", n_eval)
    if not np.isfinite(res.fun) or res.fun >= 1e300:
        return _failed("failed", "The likelihood is not finite at the optimum.", n_eval)
    if not res.success:
        return _failed("not_converged", f"Optimizer stopped: {res.message}", n_eval)
    params = unpack(res.x)
    message = "Estimated by maximum likelihood at the given transition matrix."
    if free_q and floored:
        if res.x[0] <= lo + 1e-9 or params.q < q_min:
            params = KimParams(q=float(q_min), c=params.c, m=params.m, transition=params.transition)
            message += " q is at the stated floor (the likelihood's maximum lies below it)."
    elif free_q:
        x_floor = res.x.copy()
        x_floor[0] = lo
        if (neg(x_floor) - float(res.fun)) * n_valid <= _FLAT_LOGLIK:
            params = KimParams(q=0.0, c=params.c, m=params.m, transition=params.transition)
            message += (" q = 0: the likelihood is flat down to its floor, so the premium is "
                        "estimated as constant.")
    else:
        message += " q held fixed."
    flt = filter_kim(params, y, h, state=KimState.initial(params, prior=prior,
                                                          prob=initial_prob))
    return KimFit(params, flt.loglik, True, "ok", message, n_eval, flt)
