"""The vectorised one-row steps (batch_step) against the one-series filters they stand for.

Reference twins: ``volatility.ewma_variance``, ``local_level.filter_local_level`` /
``advance_state`` / ``smooth_hindsight``, ``markov_regimes.hamilton_filter`` and
``kim_filter.filter_kim`` (each itself held against statsmodels in its own tests), run
series by series from the same random states. Tolerance 1e-12 relative: the operations
are the same and in the same order, but numpy's ``log``/``exp`` may differ from ``math``'s
in the last bit.
"""

from __future__ import annotations

import numpy as np
import pytest

from tracker.estimation import batch_step as bs
from tracker.estimation.kim_filter import KimParams, KimState, filter_kim
from tracker.estimation.local_level import FilterState, LocalLevelParams, advance_state, filter_local_level, smooth_hindsight
from tracker.estimation.markov_regimes import RegimeFilterState, RegimeParams, hamilton_filter
from tracker.estimation.volatility import EwmaParams, VarianceState, ewma_variance

RTOL = 1e-12
N = 60


@pytest.fixture()
def series():
    rng = np.random.default_rng(2026)
    sd = rng.uniform(0.004, 0.03, N)
    return {
        "rng": rng,
        "y": rng.standard_normal(N) * sd + 3e-4,
        "h": (sd * rng.uniform(0.7, 1.4, N)) ** 2,
        "q": (sd * 10 ** rng.uniform(-4, -2, N)) ** 2,
        "c": rng.uniform(0.6, 1.5, N),
        "a": rng.standard_normal(N) * 1e-3,
        "P": (sd * 10 ** rng.uniform(-2.5, -1, N)) ** 2,
    }


def test_ewma_step_is_ewma_variance(series):
    y, h = series["y"], series["h"]
    lam = np.where(np.arange(N) % 2 == 0, 0.94, 0.97)
    got = bs.ewma_step(h, y, lam)
    for i in range(N):
        ref = ewma_variance(y[i:i + 1], EwmaParams(lam=float(lam[i])),
                            VarianceState(h_next=float(h[i]), n_obs=500, started=True))
        assert ref.h[0] == h[i]                             # the row's own forecast
        np.testing.assert_allclose(got[i], ref.state.h_next, rtol=RTOL)


def test_local_level_step_is_the_kalman_filter(series):
    s = series
    got = bs.local_level_step(s["a"], s["P"], s["q"], s["c"], s["y"], s["h"])
    for i in range(N):
        p = LocalLevelParams(q=float(s["q"][i]), c=float(s["c"][i]))
        st = FilterState(mean=float(s["a"][i]), var=float(s["P"][i]), n_rows=900, n_obs=880, diffuse=False)
        ref = filter_local_level(p, s["y"][i:i + 1], s["h"][i:i + 1], state=st)
        for key, want in (("mean", ref.mean), ("var", ref.var), ("std_error", ref.std_error),
                          ("loglik_t", ref.loglik_t)):
            np.testing.assert_allclose(got[key][i], want[0], rtol=RTOL, err_msg=key)
        end = advance_state(p, s["y"][i:i + 1], s["h"][i:i + 1], state=st)
        np.testing.assert_allclose([got["mean"][i], got["var"][i]], [end.mean, end.var], rtol=RTOL)


def test_smoother_is_the_hindsight_smoother(series):
    s, rng = series, series["rng"]
    t_len = 21
    Y = rng.standard_normal((N, t_len)) * 0.01
    H = rng.uniform(0.5, 2.0, (N, t_len)) * 1e-4
    got = bs.local_level_smooth(s["a"], s["P"], s["q"], s["c"], Y, H)
    for i in range(N):
        p = LocalLevelParams(q=float(s["q"][i]), c=float(s["c"][i]))
        prior = FilterState(mean=float(s["a"][i]), var=float(s["P"][i]), n_rows=10, n_obs=10, diffuse=False)
        ref = smooth_hindsight(p, Y[i], H[i], prior=prior).mean
        np.testing.assert_allclose(got[i], ref, rtol=RTOL)


def test_hamilton_step_is_the_hamilton_filter(series):
    rng, y = series["rng"], series["y"]
    stay = rng.uniform(0.8, 0.995, (N, 2))
    trans = np.stack([np.column_stack([stay[:, 0], 1 - stay[:, 0]]),
                      np.column_stack([1 - stay[:, 1], stay[:, 1]])], axis=1)
    means = rng.standard_normal((N, 2)) * 1e-3
    variances = np.column_stack([series["h"], series["h"] * rng.uniform(2, 6, N)])
    pred = rng.dirichlet([2, 2], size=N)
    filtered, nxt, ll = bs.hamilton_step(pred, means, variances, trans, y)
    for i in range(N):
        params = RegimeParams(2, means[i], variances[i], trans[i])
        ref = hamilton_filter(y[i:i + 1], params, RegimeFilterState(pred[i], np.full(2, np.nan), 100, -5.0))
        np.testing.assert_allclose(filtered[i], ref.filtered[0], rtol=RTOL)
        np.testing.assert_allclose(nxt[i], ref.state.predicted, rtol=RTOL)
        np.testing.assert_allclose(ll[i], ref.loglik_t[0], rtol=RTOL)


def test_kim_two_step_is_the_kim_filter(series):
    s, rng = series, series["rng"]
    stay = rng.uniform(0.8, 0.995, (N, 2))
    trans = np.stack([np.column_stack([stay[:, 0], 1 - stay[:, 0]]),
                      np.column_stack([1 - stay[:, 1], stay[:, 1]])], axis=1)
    c = np.column_stack([s["c"] * 0.6, s["c"] * 2.5])
    m = np.column_stack([np.zeros(N), rng.standard_normal(N) * 1e-3])
    prob = rng.dirichlet([2, 2], size=N)
    prob[0] = [1.0, 0.0]                                   # a regime of zero weight
    a = np.column_stack([s["a"], s["a"] + rng.standard_normal(N) * 1e-4])
    P = np.column_stack([s["P"], s["P"] * rng.uniform(0.5, 2, N)])
    got = bs.kim_two_step(prob, a, P, s["q"], c, m, trans, s["y"], s["h"])
    for i in range(N):
        params = KimParams.create(float(s["q"][i]), c[i], trans[i], m[i])
        st = KimState(prob=tuple(prob[i]), mean=tuple(a[i]), var=tuple(P[i]), n_rows=50, n_obs=50, diffuse=False)
        ref = filter_kim(params, s["y"][i:i + 1], s["h"][i:i + 1], state=st)
        np.testing.assert_allclose(got["prob"][i], ref.end_state.prob, rtol=RTOL, atol=1e-300)
        np.testing.assert_allclose(got["a"][i], ref.end_state.mean, rtol=RTOL)
        np.testing.assert_allclose(got["P"][i], ref.end_state.var, rtol=RTOL)
        np.testing.assert_allclose(got["loglik_t"][i], ref.loglik_t[0], rtol=RTOL)
        np.testing.assert_allclose([got["mean"][i], got["var"][i]], [ref.mean[0], ref.var[0]], rtol=RTOL)
