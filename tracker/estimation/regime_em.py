"""Batched EM for Markov-switching mean and variance: a vectorised fitting kernel.

The model is the one of :mod:`tracker.estimation.markov_regimes` (``y_t = mu_{S_t} +
sigma_{S_t} e_t``, a K-state Markov chain with row-stochastic ``transition``, the chain
started from its stationary distribution, as statsmodels' ``MarkovRegression`` does by
default). Maximum likelihood by expectation-maximisation (Baum-Welch; Hamilton 1990):

* E step: forward filter and backward pass give the smoothed regime probabilities
  ``gamma_t`` and the summed pairwise probabilities ``xi``. Both recursions are products
  of positive K x K matrices, evaluated in blocks (prefix products vectorised across
  blocks, only the sqrt(T) block ends sequential) and batched across starting points,
  so one E step for several starts costs a few dozen numpy calls.
* M step, closed form: weighted means and variances per regime, transition counts
  normalised by row. The stationary start makes the exact M step for the transition
  implicit; the closed form ignores the first row's share, an O(1/T) difference that the
  convergence check below sees (the likelihood reported is the exact one).

Why not statsmodels' own fit: its default is a handful of EM steps then BFGS with
numerical derivatives; multi-start fits with it dominated the refit of the whole
service. statsmodels stays the reference twin: tests compare smoothed probabilities at
fixed parameters and the maximised log-likelihood with ``MarkovRegression.fit``.

Units are the caller's; fitting decimal daily returns works (no percent rescaling is
needed, unlike for BFGS).
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from tracker.estimation import jit

_LOG_2PI = math.log(2.0 * math.pi)
# Steps between rescalings of the running products in :func:`_prefix`.
_RESCALE_EVERY = 8


@dataclass(frozen=True, eq=False)
class EmResult:
    """Outcome for every start, arrays with the start on axis 0.

    ``loglik`` is the exact log-likelihood (stationary start) at the returned parameters;
    ``converged`` says the relative change of the log-likelihood fell below the tolerance;
    ``degenerate`` marks a start where a regime variance hit the floor (a regime
    collapsing onto a few values, where the likelihood is unbounded).
    """

    means: np.ndarray          # (S, K)
    variances: np.ndarray      # (S, K)
    transition: np.ndarray     # (S, K, K)
    loglik: np.ndarray         # (S,)
    converged: np.ndarray      # (S,) bool
    degenerate: np.ndarray     # (S,) bool
    n_iter: np.ndarray         # (S,) int


def stationary_batch(transition: np.ndarray) -> np.ndarray:
    """Stationary distributions of a batch of row-stochastic matrices, shape (S, K)."""
    p = np.asarray(transition, float)
    s, k, _ = p.shape
    a = np.swapaxes(p, 1, 2) - np.eye(k)[None]
    a[:, -1, :] = 1.0
    b = np.zeros((s, k))
    b[:, -1] = 1.0
    pi = np.linalg.solve(a, b[..., None])[..., 0]
    pi = np.clip(pi, 0.0, None)
    return pi / pi.sum(axis=1, keepdims=True)


def _prefix(g: np.ndarray, v0: np.ndarray) -> np.ndarray:
    """Normalised running products ``v0 g_0 g_1 ... g_{t-1}``, shape (S, T+1, K).

    ``g`` (S, T, K, K) holds positive matrices, ``v0`` (S, K) a positive row vector.
    Each product is rescaled by its largest entry (the scale cancels on normalising);
    positive matrices have no cancellation, so this matches the row-by-row recursion
    to rounding.
    """
    s, t_len, k, _ = g.shape
    out = np.empty((s, t_len + 1, k))
    out[:, 0] = v0
    if t_len == 0:
        return out
    # Within a block the running product is rescaled by its largest entry every
    # _RESCALE_EVERY steps only (a reduction per step cost more than the products): between
    # rescalings the largest entry can shrink by about the smallest transition probability
    # per step (min_stay = 1e-8 in the fit), 1e-64 over 8 steps, far from underflow.
    # Should a product still vanish, those starts are redone row by row.
    b = max(8, int(math.sqrt(t_len)))
    nb = -(-t_len // b)
    gg = np.empty((s, nb * b, k, k))
    gg[:, :t_len] = g
    gg[:, t_len:] = np.eye(k)
    gg = gg.reshape(s, nb, b, k, k)
    pref = np.empty_like(gg)
    pref[:, :, 0] = gg[:, :, 0]
    for j in range(1, b):
        np.matmul(pref[:, :, j - 1], gg[:, :, j], out=pref[:, :, j])
        if j % _RESCALE_EVERY == 0:
            pref[:, :, j] /= pref[:, :, j].max(axis=(-2, -1), keepdims=True)
    starts = np.empty((s, nb, 1, k))
    v = np.asarray(v0, float).reshape(s, 1, k)
    ends = pref[:, :, -1]
    for i in range(nb):
        starts[:, i] = v
        w = np.matmul(v, ends[:, i])
        v = w / w.sum(axis=2, keepdims=True)
    q = np.matmul(starts[:, :, None], pref)[..., 0, :].reshape(s, nb * b, k)[:, :t_len]
    with np.errstate(invalid="ignore", divide="ignore"):
        out[:, 1:] = q / q.sum(axis=2, keepdims=True)
    bad = ~np.all(np.isfinite(out), axis=(1, 2))
    for i in np.flatnonzero(bad):
        v = np.asarray(v0[i], float)
        for t in range(t_len):
            w = v @ g[i, t]
            v = w / w.sum()
            out[i, t + 1] = v
    return out


def _log_densities(y, means, variances):
    r = y[None, :, None] - means[:, None, :]
    return -0.5 * ((_LOG_2PI + np.log(variances))[:, None, :] + r * r / variances[:, None, :])


def e_step(y: np.ndarray, means: np.ndarray, variances: np.ndarray, transition: np.ndarray,
           *, compiled: bool = True):
    """Smoothed probabilities, summed pairwise probabilities and log-likelihoods.

    Parameters
    ----------
    y : (T,) finite observations; means, variances (S, K); transition (S, K, K).
    compiled : bool
        For series of at least ``jit.MIN_ROWS`` rows, use the compiled row-by-row
        recursion (:mod:`tracker.estimation.regime_em_compiled`); False, or without
        numba, the blocked numpy products below, its reference twin.

    Returns
    -------
    gamma : (S, T, K) ``P(S_t | y_0..y_{T-1})``
    xi : (S, K, K) ``sum_t P(S_t = i, S_{t+1} = j | all data)``
    loglik : (S,) exact log-likelihood with the chain started at its stationary law
    """
    y = np.asarray(y, float)
    if compiled and y.size >= jit.MIN_ROWS:
        from tracker.estimation import regime_em_compiled

        out = regime_em_compiled.e_step(y, means, variances, transition,
                                        stationary_batch(np.asarray(transition, float)))
        if out is not None:
            return out
    t_len = y.size
    p = np.asarray(transition, float)
    log_d = _log_densities(y, means, variances)                   # (S, T, K)
    mx = log_d.max(axis=2)
    lik = np.exp(log_d - mx[:, :, None])
    pi = stationary_batch(p)
    g = lik[:, :, :, None] * p[:, None, :, :]                     # diag(lik_t) P
    prior = _prefix(g, pi)[:, :t_len]                             # P(S_t | y_<t)
    joint = prior * lik
    c = joint.sum(axis=2)
    filtered = joint / c[:, :, None]
    loglik = (np.log(c) + mx).sum(axis=1)
    # backward: beta_t = H_{t+1} ... H_{T-1} 1 with H_t = P diag(lik_t); as running
    # products of the transposes taken from the end
    h_rev = (p[:, None, :, :] * lik[:, :, None, :])[:, :0:-1]     # H_{T-1}, ..., H_1
    k = p.shape[1]
    beta_rev = _prefix(np.swapaxes(h_rev, 2, 3), np.full((p.shape[0], k), 1.0 / k))
    beta = beta_rev[:, ::-1]                                      # beta[:, t] for t = 0..T-1
    gamma = filtered * beta
    gamma /= gamma.sum(axis=2, keepdims=True)
    # pairwise: xi_t(i, j) ~ filtered_t(i) P_ij lik_{t+1}(j) beta_{t+1}(j)
    right = lik[:, 1:] * beta[:, 1:]                              # (S, T-1, K)
    pair = filtered[:, :-1, :, None] * p[:, None, :, :] * right[:, :, None, :]
    pair /= pair.sum(axis=(2, 3), keepdims=True)
    return gamma, pair.sum(axis=1), loglik


def exact_loglik(y, means, variances, transition) -> np.ndarray:
    """Log-likelihood per start (forward pass only)."""
    y = np.asarray(y, float)
    p = np.asarray(transition, float)
    if y.size >= jit.MIN_ROWS:
        from tracker.estimation import regime_em_compiled

        out = regime_em_compiled.e_step(y, means, variances, p, stationary_batch(p))
        if out is not None:
            return out[2]
    log_d = _log_densities(y, np.asarray(means, float), np.asarray(variances, float))
    mx = log_d.max(axis=2)
    lik = np.exp(log_d - mx[:, :, None])
    prior = _prefix(lik[:, :, :, None] * p[:, None, :, :], stationary_batch(p))[:, : y.size]
    return (np.log((prior * lik).sum(axis=2)) + mx).sum(axis=1)


def _transition_two(xi, g0, p, min_stay, steps: int = 4):
    """Exact M step for a two-state transition under the stationary start.

    Maximises ``sum_ij xi_ij log P_ij + sum_i g0_i log pi_i(P)`` over ``a = P[0, 1]``,
    ``b = P[1, 0]`` (``pi = (b, a) / (a + b)``) by Newton steps from the closed-form
    counts solution; a step that lowers the objective is not taken.
    """
    n00, n01, n10, n11 = xi[:, 0, 0], xi[:, 0, 1], xi[:, 1, 0], xi[:, 1, 1]
    e0, e1 = g0[:, 0], g0[:, 1]
    lo, hi = min_stay, 1.0 - min_stay
    a, b = np.clip(p[:, 0, 1], lo, hi), np.clip(p[:, 1, 0], lo, hi)

    def q(a, b):
        return (n00 * np.log1p(-a) + (n01 + e1) * np.log(a) + (n10 + e0) * np.log(b)
                + n11 * np.log1p(-b) - np.log(a + b))

    cur = q(a, b)
    for _ in range(steps):
        u = 1.0 / (a + b)
        ga = -n00 / (1 - a) + (n01 + e1) / a - u
        gb = (n10 + e0) / b - n11 / (1 - b) - u
        haa = -n00 / (1 - a) ** 2 - (n01 + e1) / a ** 2 + u * u
        hbb = -(n10 + e0) / b ** 2 - n11 / (1 - b) ** 2 + u * u
        hab = u * u
        det = haa * hbb - hab * hab
        with np.errstate(divide="ignore", invalid="ignore"):
            da = -(hbb * ga - hab * gb) / det
            db = -(haa * gb - hab * ga) / det
        na, nb = np.clip(a + da, lo, hi), np.clip(b + db, lo, hi)
        new = q(na, nb)
        take = np.isfinite(new) & (new >= cur) & (det > 0) & (haa < 0)
        a, b, cur = np.where(take, na, a), np.where(take, nb, b), np.where(take, new, cur)
    out = np.empty_like(p)
    out[:, 0, 0], out[:, 0, 1], out[:, 1, 0], out[:, 1, 1] = 1 - a, a, b, 1 - b
    return out


def _m_step(y, gamma, xi, floor, min_stay):
    w = gamma.sum(axis=1)                                          # (S, K)
    mu = np.einsum("stk,t->sk", gamma, y) / w
    r = y[None, :, None] - mu[:, None, :]
    var = np.maximum(np.einsum("stk,stk->sk", gamma, r * r) / w, floor)
    p = np.maximum(xi / xi.sum(axis=2, keepdims=True), min_stay)
    p /= p.sum(axis=2, keepdims=True)
    if p.shape[1] == 2:
        p = _transition_two(xi, gamma[:, 0], p, min_stay)
    return mu, var, p


def _pack(mu, var, p):
    s, k = mu.shape
    return np.concatenate((mu, np.log(var), np.log(p).reshape(s, k * k)), axis=1)


def _unpack(theta, k, floor, min_stay):
    s = theta.shape[0]
    mu = theta[:, :k]
    var = np.maximum(np.exp(theta[:, k:2 * k]), floor)
    lp = theta[:, 2 * k:].reshape(s, k, k)
    p = np.exp(lp - lp.max(axis=2, keepdims=True))
    p = np.maximum(p / p.sum(axis=2, keepdims=True), min_stay)
    return mu, var, p / p.sum(axis=2, keepdims=True)


def fit_em(y, means, variances, transition, *, max_iter: int = 500, tol: float = 1e-10,
           variance_floor: float = 0.0, min_stay: float = 1e-8) -> EmResult:
    """EM from every start at once, accelerated by SQUAREM.

    Plain EM crawls near the optimum (its rate is the fraction of missing
    information, high for persistent regimes). Each cycle here takes two EM steps
    ``theta1 = M(theta0)``, ``theta2 = M(theta1)``, extrapolates along them with the
    squared step of Varadhan and Roland (2008, scheme S3, in means, log variances and
    log transition probabilities), and ends with one EM step from the extrapolated
    point; when that point has a lower likelihood than ``theta1`` the cycle falls
    back to ``theta2`` (monotone, like EM).

    Parameters
    ----------
    y : (T,) finite observations.
    means, variances : (S, K) starting values; transition : (S, K, K) row-stochastic.
    max_iter : int
        E steps per start at most (three per cycle).
    tol : float
        A start has converged when a cycle raises its log-likelihood by less than
        ``tol * max(|loglik|, T)``.
    variance_floor : float
        Lower bound on every regime variance (in the units of ``y`` squared).
    min_stay : float
        Transition probabilities are kept at or above this (a zero would be absorbing).
    """
    y = np.asarray(y, float)
    mu = np.array(means, float, ndmin=2, copy=True)
    var = np.maximum(np.array(variances, float, ndmin=2, copy=True), variance_floor)
    p = np.array(transition, float, ndmin=3, copy=True)
    s, k = mu.shape
    floor = max(float(variance_floor), 1e-300)
    converged = np.zeros(s, bool)
    dead = np.zeros(s, bool)
    n_iter = np.zeros(s, int)
    last = np.full(s, -np.inf)

    def em(a, m0, v0, p0):
        gamma, xi, ll = e_step(y, m0, v0, p0)
        n_iter[a] += 1
        return (*_m_step(y, gamma, xi, floor, min_stay), ll)

    while True:
        act = np.flatnonzero(~converged & ~dead & (n_iter < max_iter))
        if act.size == 0:
            break
        m0, v0, p0 = mu[act], var[act], p[act]
        m1, v1, p1, ll0 = em(act, m0, v0, p0)
        m2, v2, p2, ll1 = em(act, m1, v1, p1)
        t0, t1, t2 = _pack(m0, v0, p0), _pack(m1, v1, p1), _pack(m2, v2, p2)
        r = t1 - t0
        v = t2 - t1 - r
        nr, nv = np.linalg.norm(r, axis=1), np.linalg.norm(v, axis=1)
        with np.errstate(divide="ignore", invalid="ignore"):
            alpha = np.where(nv > 0, -nr / nv, -1.0)
        alpha = np.minimum(alpha, -1.0)[:, None]                  # -1 is plain EM (theta2)
        mx, vx, px = _unpack(t0 - 2.0 * alpha * r + alpha * alpha * v, k, floor, min_stay)
        m3, v3, p3, llx = em(act, mx, vx, px)
        take = np.isfinite(llx) & (llx >= ll1)
        new_m = np.where(take[:, None], m3, m2)
        new_v = np.where(take[:, None], v3, v2)
        new_p = np.where(take[:, None, None], p3, p2)
        best = np.where(take, llx, ll1)                            # ll before the last step
        ok = np.isfinite(ll0) & np.isfinite(best)
        # relative to the sample size too: a log-likelihood near zero (percent units, daily
        # sd ~0.3%) must not make the tolerance vanish below rounding
        done = ok & (np.abs(best - last[act]) <= tol * np.maximum(np.abs(best), y.size))
        mu[act], var[act], p[act] = new_m, new_v, new_p
        last[act] = best
        converged[act[done]] = True
        dead[act[~ok]] = True             # a non-finite likelihood ends the start
    final = exact_loglik(y, mu, var, p)
    degenerate = np.any(var <= floor * (1.0 + 1e-9), axis=1) | ~np.isfinite(final)
    conv = converged & np.isfinite(final)
    return EmResult(mu, var, p, final, conv, degenerate, n_iter)
