"""One new row for many series at once: the daily step of each filter, vectorised.

A day's update advances every factor's filters by one row. Run factor by factor, each
step is a few dozen floating-point operations wrapped in array and object handling that
costs far more than the arithmetic (about 0.7 ms a factor). Here every argument is an
array over the series (shape ``(N,)``, or ``(N, K)`` / ``(N, K, K)`` for regimes) and each
function does one step for all of them, with the operations of the one-series code in the
same order:

* :func:`ewma_step` -- :func:`tracker.estimation.volatility.ewma_variance` on one valid
  row of a started EWMA;
* :func:`local_level_step` -- :func:`tracker.estimation.local_level.filter_local_level`
  (and ``advance_state``) on one valid row from a non-diffuse state;
* :func:`local_level_smooth` -- ``smooth_hindsight`` over a block of valid rows from a
  non-diffuse prior;
* :func:`hamilton_step` -- :func:`tracker.estimation.markov_regimes.hamilton_filter` on one
  row;
* :func:`kim_two_step` -- the two-regime Kim filter (``kim_filter._kim_pass_two``) on one
  valid row from a non-diffuse state, and its collapsed mean and variance.

The one-series functions stay the reference and the path for everything else (missing
rows, diffuse starts, GARCH, other numbers of regimes); ``tests/estimation/
test_batch_step.py`` holds each step against them. Where the one-series code uses
``math.log``/``math.exp`` these use numpy's, which may differ in the last bit.
"""

from __future__ import annotations

import math

import numpy as np

_LOG_2PI = math.log(2.0 * math.pi)


def ewma_step(h_prev: np.ndarray, y: np.ndarray, lam: np.ndarray) -> np.ndarray:
    """The next variance forecast after a valid return ``y`` with forecast ``h_prev``
    (``h_prev`` is the forecast that applies to the row; it is the row's ``h``)."""
    return (1.0 - lam) * (y * y) + lam * h_prev


def local_level_step(a, P, q, c, y, h) -> dict:
    """Predict and update the local level on one valid row (``y``, ``h`` finite, ``h > 0``).

    Returns the one-row outputs of ``filter_local_level``: ``a_pred``, ``P_pred``, ``v``,
    ``F``, ``mean``, ``var`` (the updated state is ``mean``, ``var``), ``loglik_t`` and
    ``std_error``.
    """
    R = c * h
    Pt = P + q
    F = Pt + R
    v = y - a
    mean = a + Pt / F * v
    var = Pt * R / F
    ll = -0.5 * (_LOG_2PI + np.log(F) + v * v / F)
    return {"a_pred": a, "P_pred": Pt, "v": v, "F": F, "mean": mean, "var": var,
            "loglik_t": ll, "std_error": v / np.sqrt(F)}


def local_level_smooth(a0, P0, q, c, Y, H) -> np.ndarray:
    """Smoothed means (Rauch-Tung-Striebel) of ``T`` valid rows per series, from a
    non-diffuse prior ``(a0, P0)``; ``Y``, ``H`` shape ``(N, T)``. Returns ``(N, T)``."""
    n, t_len = Y.shape
    m = np.empty((n, t_len))
    p = np.empty((n, t_len))
    a, P = a0, P0
    for t in range(t_len):
        R = c * H[:, t]
        Pt = P + q
        F = Pt + R
        a = a + Pt / F * (Y[:, t] - a)
        P = Pt * R / F
        m[:, t], p[:, t] = a, P
    sm = m.copy()
    for t in range(t_len - 2, -1, -1):
        Pnext = p[:, t] + q
        J = p[:, t] / Pnext
        sm[:, t] = m[:, t] + J * (sm[:, t + 1] - m[:, t])
    return sm


def hamilton_step(predicted, means, variances, transition, y) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Hamilton filter on one row per series: ``predicted`` (N, K) is P(S of the row) before
    it, ``means``/``variances`` (N, K), ``transition`` (N, K, K), ``y`` (N,) finite.
    Returns filtered (N, K), predicted for the next row (N, K) and the row's log-likelihood."""
    r = y[:, None] - means
    log_dens = -0.5 * ((_LOG_2PI + np.log(variances)) + r * r / variances)
    mx = log_dens.max(axis=1)
    lik = np.exp(log_dens - mx[:, None])
    joint = predicted * lik
    total = joint.sum(axis=1)
    filtered = joint / total[:, None]
    nxt = np.einsum("nk,nkj->nj", filtered, transition)
    return filtered, nxt, np.log(total) + mx


def kim_two_step(prob, a, P, q, c, m, transition, y, h) -> dict:
    """The two-regime Kim filter on one valid row from a non-diffuse state.

    ``prob``, ``a``, ``P``, ``c``, ``m`` shape (N, 2); ``transition`` (N, 2, 2); ``q``, ``y``,
    ``h`` (N,). Returns the new ``prob``, ``a``, ``P`` (N, 2), the row's ``loglik_t`` and the
    collapsed ``mean`` and ``var`` (N,).
    """
    pr0, pr1 = prob[:, 0], prob[:, 1]
    p00, p01 = transition[:, 0, 0], transition[:, 0, 1]
    p10, p11 = transition[:, 1, 0], transition[:, 1, 1]
    w00, w01, w10, w11 = pr0 * p00, pr0 * p01, pr1 * p10, pr1 * p11
    a0, a1 = a[:, 0], a[:, 1]
    Pt0, Pt1 = P[:, 0] + q, P[:, 1] + q
    d0, d1 = y - a0, y - a1
    R0, R1 = c[:, 0] * h, c[:, 1] * h
    m0, m1 = m[:, 0], m[:, 1]

    def branch(Pt, R, d, mj, ai):
        F = Pt + R
        v = d - mj
        return -0.5 * (_LOG_2PI + np.log(F) + v * v / F), ai + Pt / F * v, Pt * R / F

    e00, b00, Q00 = branch(Pt0, R0, d0, m0, a0)
    e10, b10, Q10 = branch(Pt1, R0, d1, m0, a1)
    e01, b01, Q01 = branch(Pt0, R1, d0, m1, a0)
    e11, b11, Q11 = branch(Pt1, R1, d1, m1, a1)
    # the largest log density among pairs of positive weight, in the one-series order
    emax = np.full(y.shape, -np.inf)
    for e, w in ((e00, w00), (e10, w10), (e01, w01), (e11, w11)):
        emax = np.where((e > emax) & (w > 0.0), e, emax)
    w00, w01, w10, w11 = (np.where(w > 0.0, w * np.exp(e - emax), 0.0)
                          for w, e in ((w00, e00), (w01, e01), (w10, e10), (w11, e11)))
    ll = emax + np.log(w00 + w01 + w10 + w11)
    tot = w00 + w01 + w10 + w11

    def collapse(wa, wb, ba, bb, Qa, Qb):
        s = wa + wb
        ok = s > 0.0
        with np.errstate(divide="ignore", invalid="ignore"):
            u0 = np.where(ok, wa / s, pr0)
            u1 = np.where(ok, wb / s, pr1)
        na = u0 * ba + u1 * bb
        dv0, dv1 = ba - na, bb - na
        return s / tot, na, u0 * (Qa + dv0 * dv0) + u1 * (Qb + dv1 * dv1)

    n_pr0, n_a0, n_P0 = collapse(w00, w10, b00, b10, Q00, Q10)
    n_pr1, n_a1, n_P1 = collapse(w01, w11, b01, b11, Q01, Q11)
    new_prob = np.stack([n_pr0, n_pr1], axis=1)
    new_a = np.stack([n_a0, n_a1], axis=1)
    new_P = np.stack([n_P0, n_P1], axis=1)
    mean = np.einsum("nk,nk->n", new_prob, new_a)
    var = np.einsum("nk,nk->n", new_prob, new_P + (new_a - mean[:, None]) ** 2)
    return {"prob": new_prob, "a": new_a, "P": new_P, "loglik_t": ll, "mean": mean, "var": var}
