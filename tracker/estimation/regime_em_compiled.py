"""The EM E step for Markov-switching regimes as a compiled row-by-row recursion.

:func:`tracker.estimation.regime_em.e_step` evaluates the forward and backward passes
as blocked matrix products in numpy: a few dozen calls, but each one touches arrays of
shape (starts, T, K, K), so an E step over 6,500 rows and four starts costs about 5 ms
and a cold fit needs 20-40 of them. Here the same quantities come from the textbook
scaled recursion (forward probabilities normalised each row, the backward pass divided
by the same row constants; Rabiner 1989), compiled with numba
(:mod:`tracker.estimation.jit`): about 0.1 ms for the same E step. The numpy e_step is
the reference twin (tests/estimation/test_regime_em.py), itself checked against
statsmodels' ``MarkovRegression.smooth``.
"""
from __future__ import annotations

import math

import numpy as np

from tracker.estimation import jit

_LOG_2PI = math.log(2.0 * math.pi)


def _forward_backward(y, means, variances, p, pi):
    """gamma (S, T, K), xi (S, K, K), loglik (S,) for every start; see ``e_step``."""
    n_s, k = means.shape
    t_len = y.size
    gamma = np.empty((n_s, t_len, k))
    xi = np.zeros((n_s, k, k))
    loglik = np.zeros(n_s)
    lik = np.empty((t_len, k))
    alpha = np.empty((t_len, k))
    scale = np.empty(t_len)
    beta = np.empty(k)
    nxt = np.empty(k)
    pair = np.empty((k, k))
    norm = np.empty(k)
    for s in range(n_s):
        total = 0.0
        for j in range(k):
            norm[j] = _LOG_2PI + math.log(variances[s, j])
        # densities scaled by their largest entry per row (the scale returns in loglik)
        for t in range(t_len):
            mx = -math.inf
            for j in range(k):
                r = y[t] - means[s, j]
                d = -0.5 * (norm[j] + r * r / variances[s, j])
                lik[t, j] = d
                if d > mx:
                    mx = d
            for j in range(k):
                lik[t, j] = math.exp(lik[t, j] - mx)
            total += mx
        # forward: alpha_t = P(S_t | y_0..y_t)
        for t in range(t_len):
            c = 0.0
            for j in range(k):
                if t == 0:
                    pr = pi[s, j]
                else:
                    pr = 0.0
                    for i in range(k):
                        pr += alpha[t - 1, i] * p[s, i, j]
                a = pr * lik[t, j]
                alpha[t, j] = a
                c += a
            for j in range(k):
                alpha[t, j] /= c
            scale[t] = c
            total += math.log(c)
        loglik[s] = total
        # backward, scaled by the same row constants; gamma and the pairwise sums
        for j in range(k):
            beta[j] = 1.0
            gamma[s, t_len - 1, j] = alpha[t_len - 1, j]
        for t in range(t_len - 2, -1, -1):
            for j in range(k):
                nxt[j] = lik[t + 1, j] * beta[j]
            tot = 0.0
            for i in range(k):
                for j in range(k):
                    v = alpha[t, i] * p[s, i, j] * nxt[j]
                    pair[i, j] = v
                    tot += v
            for i in range(k):
                for j in range(k):
                    xi[s, i, j] += pair[i, j] / tot
            g_tot = 0.0
            for i in range(k):
                b = 0.0
                for j in range(k):
                    b += p[s, i, j] * nxt[j]
                beta[i] = b / scale[t + 1]
                g = alpha[t, i] * beta[i]
                gamma[s, t, i] = g
                g_tot += g
            for i in range(k):
                gamma[s, t, i] /= g_tot
    return gamma, xi, loglik


def kernel():
    """The compiled recursion, or None when numba is not installed."""
    probe = (np.zeros(3), np.zeros((1, 2)), np.ones((1, 2)), np.full((1, 2, 2), 0.5),
             np.full((1, 2), 0.5))
    return jit.compiled(_forward_backward, probe)


def e_step(y, means, variances, transition, pi):
    """Compiled twin of :func:`tracker.estimation.regime_em.e_step` (``pi`` given)."""
    fn = kernel()
    if fn is None:
        return None
    return fn(np.ascontiguousarray(y, dtype=np.float64),
              np.ascontiguousarray(means, dtype=np.float64),
              np.ascontiguousarray(variances, dtype=np.float64),
              np.ascontiguousarray(transition, dtype=np.float64),
              np.ascontiguousarray(pi, dtype=np.float64))
