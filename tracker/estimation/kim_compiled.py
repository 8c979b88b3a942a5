"""The Kim filter for two regimes, compiled with numba.

A likelihood evaluation is a pass over the whole history, and the fit needs dozens of
them; the interpreted kernel (:func:`tracker.estimation.kim_filter._kim_pass_two`) costs
about 2 us per row. This is the same recursion, operation for operation, with the same
outputs, compiled on first use (:mod:`tracker.estimation.jit`) and used for passes of at
least ``MIN_ROWS`` rows (the fit's likelihood and the filter of a whole history). The
interpreted kernel stays the reference twin (tests/estimation/test_kim_filter.py) and
filters the short blocks of daily updates.

If numba cannot be imported the fit uses the interpreted kernel: the same numbers,
slower.
"""
from __future__ import annotations

import math

import numpy as np

from tracker.estimation import jit

_LOG_2PI = math.log(2.0 * math.pi)
MIN_ROWS = jit.MIN_ROWS


def _pass_two(q, c0, c1, m0, m1, p00, p01, p10, p11, pr0, pr1, a0, a1, P0, P1, diffuse,
              y, h, valid, out_prob, out_mean, out_var, out_ll):
    """``_kim_pass_two`` over arrays: fills the outputs, returns (loglik, end state...).

    ``out_prob``, ``out_mean``, ``out_var`` have 2 T entries (regime-major per row, as the
    interpreted kernel's lists), ``out_ll`` T; a row that adds nothing to the likelihood
    (missing, or before the first observation) has NaN there.
    """
    total = 0.0
    log_2pi = _LOG_2PI
    nan = math.nan
    for t in range(y.size):
        w00, w01, w10, w11 = pr0 * p00, pr0 * p01, pr1 * p10, pr1 * p11
        out_ll[t] = nan
        if diffuse:
            pr0, pr1 = w00 + w10, w01 + w11
            if valid[t]:
                yt, ht = y[t], h[t]
                a0, a1 = yt - m0, yt - m1
                P0, P1 = c0 * ht, c1 * ht
                diffuse = False
                out_ll[t] = -0.5 * log_2pi
                total += -0.5 * log_2pi
                out_prob[2 * t], out_prob[2 * t + 1] = pr0, pr1
                out_mean[2 * t], out_mean[2 * t + 1] = a0, a1
                out_var[2 * t], out_var[2 * t + 1] = P0, P1
            else:
                out_prob[2 * t], out_prob[2 * t + 1] = pr0, pr1
                out_mean[2 * t] = out_mean[2 * t + 1] = nan
                out_var[2 * t] = out_var[2 * t + 1] = nan
            continue
        if not valid[t]:
            Pt0, Pt1 = P0 + q, P1 + q
            b00 = b01 = a0
            b10 = b11 = a1
            Q00 = Q01 = Pt0
            Q10 = Q11 = Pt1
        else:
            yt, ht = y[t], h[t]
            Pt0, Pt1 = P0 + q, P1 + q
            d0, d1 = yt - a0, yt - a1
            R0, R1 = c0 * ht, c1 * ht
            F = Pt0 + R0
            v = d0 - m0
            e00 = -0.5 * (log_2pi + math.log(F) + v * v / F)
            b00 = a0 + Pt0 / F * v
            Q00 = Pt0 * R0 / F
            F = Pt1 + R0
            v = d1 - m0
            e10 = -0.5 * (log_2pi + math.log(F) + v * v / F)
            b10 = a1 + Pt1 / F * v
            Q10 = Pt1 * R0 / F
            F = Pt0 + R1
            v = d0 - m1
            e01 = -0.5 * (log_2pi + math.log(F) + v * v / F)
            b01 = a0 + Pt0 / F * v
            Q01 = Pt0 * R1 / F
            F = Pt1 + R1
            v = d1 - m1
            e11 = -0.5 * (log_2pi + math.log(F) + v * v / F)
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
            w00 = w00 * math.exp(e00 - emax) if w00 > 0.0 else 0.0
            w01 = w01 * math.exp(e01 - emax) if w01 > 0.0 else 0.0
            w10 = w10 * math.exp(e10 - emax) if w10 > 0.0 else 0.0
            w11 = w11 * math.exp(e11 - emax) if w11 > 0.0 else 0.0
            ll = emax + math.log(w00 + w01 + w10 + w11)
            out_ll[t] = ll
            total += ll
        # collapse (moment matching over the previous regime), as _collapse_two
        tot = w00 + w01 + w10 + w11
        s = w00 + w10
        if s > 0.0:
            u0, u1 = w00 / s, w10 / s
        else:
            u0, u1 = pr0, pr1
        n_a0 = u0 * b00 + u1 * b10
        dv0, dv1 = b00 - n_a0, b10 - n_a0
        n_P0 = u0 * (Q00 + dv0 * dv0) + u1 * (Q10 + dv1 * dv1)
        n_pr0 = s / tot
        s = w01 + w11
        if s > 0.0:
            u0, u1 = w01 / s, w11 / s
        else:
            u0, u1 = pr0, pr1
        n_a1 = u0 * b01 + u1 * b11
        dv0, dv1 = b01 - n_a1, b11 - n_a1
        n_P1 = u0 * (Q01 + dv0 * dv0) + u1 * (Q11 + dv1 * dv1)
        pr0, pr1, a0, a1, P0, P1 = n_pr0, s / tot, n_a0, n_a1, n_P0, n_P1
        out_prob[2 * t], out_prob[2 * t + 1] = pr0, pr1
        out_mean[2 * t], out_mean[2 * t + 1] = a0, a1
        out_var[2 * t], out_var[2 * t + 1] = P0, P1
    return total, pr0, pr1, a0, a1, P0, P1, diffuse


def compiled():
    """The compiled kernel, or None when numba is not installed."""
    z = np.zeros(6)
    probe = (1e-8, 1.0, 2.0, 0.0, 0.0, 0.9, 0.1, 0.1, 0.9, 0.5, 0.5, 0.0, 0.0, 0.0, 0.0, True,
             np.zeros(3), np.ones(3), np.ones(3, dtype=np.bool_), z, z.copy(), z.copy(), np.zeros(3))
    return jit.compiled(_pass_two, probe)


def pass_two(params, y: np.ndarray, h: np.ndarray, valid: np.ndarray, state):
    """The compiled twin of ``kim_filter._kim_pass_two``, with its outputs, or None without
    numba: ``(out_prob, out_mean, out_var, out_ll, (prob, mean, var, diffuse))``."""
    fn = compiled()
    if fn is None:
        return None
    n = y.size
    out_prob, out_mean, out_var, out_ll = np.empty(2 * n), np.empty(2 * n), np.empty(2 * n), np.empty(n)
    (p00, p01), (p10, p11) = params.transition
    total, pr0, pr1, a0, a1, P0, P1, diffuse = fn(
        float(params.q), float(params.c[0]), float(params.c[1]),
        float(params.m[0]), float(params.m[1]), float(p00), float(p01), float(p10), float(p11),
        float(state.prob[0]), float(state.prob[1]), float(state.mean[0]), float(state.mean[1]),
        float(state.var[0]), float(state.var[1]), bool(state.diffuse),
        np.ascontiguousarray(y, dtype=np.float64), np.ascontiguousarray(h, dtype=np.float64),
        np.ascontiguousarray(valid, dtype=np.bool_), out_prob, out_mean, out_var, out_ll)
    return out_prob, out_mean, out_var, out_ll, ([pr0, pr1], [a0, a1], [P0, P1], bool(diffuse)), total


def loglik_two(params, y: np.ndarray, h: np.ndarray, valid: np.ndarray, state) -> float:
    """Summed log-likelihood of a two-regime Kim pass (compiled when available)."""
    out = pass_two(params, y, h, valid, state) if y.size >= MIN_ROWS else None
    if out is None:
        from tracker.estimation.kim_filter import _kim_pass_two

        ll = _kim_pass_two(params, y, h, valid, state)[3]
        # rows that count (valid): a NaN among them makes the total NaN, as the compiled
        # pass does, and the fit rejects the point; missing rows carry NaN by design
        return math.fsum(v for v, ok in zip(ll, np.asarray(valid).tolist()) if ok)
    return float(out[5])
