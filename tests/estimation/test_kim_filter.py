"""Tests of the regime-aware premium (Kim filter).

References: our own plain Kalman filter (tracker.estimation.local_level, itself held to
statsmodels in test_local_level.py) for the one-regime and identical-regime cases;
statsmodels MarkovRegression's Hamilton filter for the known-level case; the general
K-regime kernel as reference twin of the unrolled two-regime kernel; seeded simulations.
"""

import json

import numpy as np
import pytest
import statsmodels.api as sm

from tracker.estimation.kim_filter import (
    KimParams,
    KimState,
    _inputs,
    _kim_pass,
    _kim_pass_two,
    filter_kim,
    fit_kim,
    stationary_distribution,
    transition_from_statsmodels,
)
from tracker.estimation.local_level import FilterState, LocalLevelParams, filter_local_level
from tracker.estimation.volatility import ewma_variance

TWO = np.array([[0.98, 0.02], [0.05, 0.95]])
THREE = np.array([[0.97, 0.02, 0.01], [0.04, 0.92, 0.04], [0.02, 0.03, 0.95]])


@pytest.fixture(scope="module")
def factor():
    rng = np.random.default_rng(17)
    n = 4000
    vol = 0.01 * np.exp(0.4 * np.sin(np.arange(n) / 250.0))
    r = 3e-4 + vol * rng.standard_normal(n)
    r[[0, 40, 41, 2000]] = np.nan
    return r, ewma_variance(r).h


def _assert_same_filter(kim, plain, scale):
    np.testing.assert_allclose(kim.mean, plain.mean, rtol=0, atol=1e-12 * scale)
    np.testing.assert_allclose(kim.var, plain.var, rtol=1e-12)
    np.testing.assert_allclose(kim.forecast, plain.forecast, rtol=0, atol=1e-12 * scale)
    np.testing.assert_allclose(kim.forecast_var, plain.forecast_var, rtol=1e-12)
    np.testing.assert_allclose(kim.std_error, plain.std_error, rtol=0, atol=1e-12)
    np.testing.assert_allclose(kim.loglik_t, plain.loglik_t, rtol=1e-12, atol=1e-12)
    assert kim.loglik == pytest.approx(plain.loglik, rel=1e-12)
    assert kim.nobs == plain.nobs


@pytest.mark.parametrize("prior", [None, FilterState.weak_prior(0.0, 1e-6)])
def test_one_regime_equals_plain_kalman_filter(factor, prior):
    # Reference: local_level.filter_local_level at the same q, c (tolerance 1e-12).
    y, h = factor
    q, c = 4e-9, 1.2
    plain = filter_local_level(LocalLevelParams(q, c), y, h, state=prior, h_next=1e-4)
    kp = KimParams.create(q, [c], [[1.0]])
    kim = filter_kim(kp, y, h, state=KimState.initial(kp, prior=prior), h_next=1e-4)
    _assert_same_filter(kim, plain, np.nanstd(y))
    np.testing.assert_allclose(kim.regime_prob, 1.0)


@pytest.mark.parametrize("transition", [TWO, THREE])
def test_identical_regimes_equal_plain_kalman_filter(factor, transition):
    # Identical regimes carry no information: Kim = plain filter, probabilities stay stationary.
    y, h = factor
    q, c = 4e-9, 1.2
    k = transition.shape[0]
    plain = filter_local_level(LocalLevelParams(q, c), y, h, h_next=1e-4)
    kim = filter_kim(KimParams.create(q, [c] * k, transition), y, h, h_next=1e-4)
    _assert_same_filter(kim, plain, np.nanstd(y))
    pi = stationary_distribution(transition)
    np.testing.assert_allclose(kim.regime_prob, np.broadcast_to(pi, kim.regime_prob.shape),
                               rtol=0, atol=1e-12)


def test_known_level_equals_hamilton_filter_of_statsmodels():
    # Reference: statsmodels MarkovRegression (Hamilton 1989 filter) with switching mean and
    # variance.  With q = 0 and the level known (weak prior of variance 0) the Kim filter is
    # exactly a Hamilton filter.  The transition matrix is taken from statsmodels (column
    # convention) and converted.  Tolerance: 1e-10 on probabilities, 1e-10 relative on loglik.
    rng = np.random.default_rng(23)
    n = 500
    s = np.zeros(n, dtype=int)
    for t in range(1, n):
        s[t] = int(rng.random() < TWO[s[t - 1], 1])
    mu, shift, scale = 0.5, np.array([0.0, -1.0]), np.array([1.0, 4.0])
    y = mu + shift[s] + np.sqrt(scale[s]) * rng.standard_normal(n)
    model = sm.tsa.MarkovRegression(y, k_regimes=2, trend="c", switching_variance=True)
    sm_params = np.array([TWO[0, 0], TWO[1, 0], mu + shift[0], mu + shift[1], *scale])
    ref = model.filter(sm_params)
    p_rows = transition_from_statsmodels(model.regime_transition_matrix(sm_params)[:, :, 0])
    np.testing.assert_allclose(p_rows, TWO, rtol=1e-14)
    kp = KimParams.create(0.0, scale, p_rows, shift)
    kim = filter_kim(kp, y, np.ones(n), state=KimState.initial(kp, FilterState.weak_prior(mu, 0.0)))
    np.testing.assert_allclose(kim.regime_prob, np.asarray(ref.filtered_marginal_probabilities),
                               rtol=0, atol=1e-10)
    np.testing.assert_allclose(kim.predicted_prob[:-1],
                               np.asarray(ref.predicted_marginal_probabilities)[1:],
                               rtol=0, atol=1e-10)
    assert kim.loglik == pytest.approx(ref.llf, rel=1e-10)


@pytest.mark.parametrize("prior", [None, FilterState.weak_prior(0.0, 1e-6)])
def test_unrolled_two_regime_kernel_equals_general_kernel(factor, prior):
    # Reference twin: the general K-regime kernel; same operations, so equal to the last bit.
    y, h = factor
    kp = KimParams.create(4e-9, [0.6, 2.5], TWO, [0.0, -3e-3])
    yy, hh, valid = _inputs(y, h)
    state = KimState.initial(kp, prior=prior)
    fast = _kim_pass_two(kp, yy, hh, valid, state)
    general = _kim_pass(kp, yy, hh, valid, state)
    for a, b in zip(fast[:4], general[:4]):
        np.testing.assert_array_equal(np.asarray(a), np.asarray(b))
    np.testing.assert_array_equal(np.asarray(fast[4][:3], dtype=float),
                                  np.asarray(general[4][:3], dtype=float))


@pytest.mark.parametrize("transition, split", [(TWO, 1), (TWO, 2500), (THREE, 41)])
def test_two_chunks_equal_one_pass(factor, transition, split):
    y, h = factor
    k = transition.shape[0]
    kp = KimParams.create(4e-9, np.linspace(0.6, 2.5, k), transition, np.linspace(0, -2e-3, k))
    full = filter_kim(kp, y, h, h_next=1e-4)
    a = filter_kim(kp, y[:split], h[:split], h_next=h[split])
    stored = KimState.from_dict(json.loads(json.dumps(a.end_state.to_dict(), allow_nan=False)))
    b = filter_kim(kp, y[split:], h[split:], state=stored, h_next=1e-4)
    for name in ("regime_prob", "predicted_prob", "regime_mean", "regime_var", "mean", "var",
                 "forecast", "forecast_var", "std_error", "loglik_t"):
        joined = np.concatenate((getattr(a, name), getattr(b, name)))
        np.testing.assert_allclose(joined, getattr(full, name), rtol=1e-12, atol=0,
                                   err_msg=name)
    assert a.loglik + b.loglik == pytest.approx(full.loglik, rel=1e-12)
    assert b.end_state.to_dict() == full.end_state.to_dict()


def _regime_simulation(seed: int, n: int = 3000):
    """Calm / turbulent regimes (noise variance x5) around a slowly drifting premium."""
    rng = np.random.default_rng(seed)
    scale, q = np.array([1.0, 5.0]), 1e-9
    s = np.zeros(n, dtype=int)
    u = rng.random(n)
    for t in range(1, n):
        s[t] = int(u[t] < TWO[s[t - 1], 1])
    h = 1e-4 * np.exp(0.5 * np.sin(2 * np.pi * np.arange(n) / 750.0))
    mu = 3e-4 + np.cumsum(rng.standard_normal(n)) * np.sqrt(q)
    y = mu + np.sqrt(scale[s] * h) * rng.standard_normal(n)
    return y, h, s, scale, q


def test_filtered_probabilities_identify_turbulent_regime():
    # Seeded known truth; the calm regime is 71% of days (stationary), so always guessing
    # calm scores 0.71.  The filter must classify at least 82% of days correctly.
    y, h, s, scale, q = _regime_simulation(seed=4)
    kim = filter_kim(KimParams.create(q, scale, TWO), y, h)
    p_turb = kim.regime_prob[:, 1]
    assert np.mean((p_turb > 0.5) == (s == 1)) >= 0.82
    assert p_turb[s == 1].mean() >= 0.6
    assert p_turb[s == 0].mean() <= 0.2


def test_fit_recovers_regime_variances():
    # Seeded known truth c = (1, 5) at the true transition matrix.  Bands 15% / 20% are about
    # 3.5 sampling sd (sd of the estimates over seeds 0-29 of this design: 4% and 6%).
    y, h, s, scale, q = _regime_simulation(seed=8)
    fit = fit_kim(y, h, TWO)
    assert fit.status == "ok" and fit.converged
    assert fit.params.c[0] == pytest.approx(1.0, rel=0.15)
    assert fit.params.c[1] == pytest.approx(5.0, rel=0.20)
    assert fit.loglik == pytest.approx(fit.filtered.loglik, rel=1e-12)
    # a warm start from the estimate stays there
    warm = fit_kim(y, h, TWO, start=fit.params)
    np.testing.assert_allclose(warm.params.c, fit.params.c, rtol=1e-3)
    # q held at its true value: only the regime scales are searched
    held = fit_kim(y, h, TWO, fixed_q=q)
    assert held.status == "ok" and held.params.q == q
    np.testing.assert_allclose(held.params.c, scale, rtol=0.20)
    assert held.loglik <= fit.loglik + 1e-6  # a restricted maximum cannot beat the full one


def test_fit_recovers_mean_shift():
    # Seeded known truth with a large shift in regime 1 (m = -1.5 noise sd), h = 1.
    rng = np.random.default_rng(31)
    n = 1500
    s = np.zeros(n, dtype=int)
    for t in range(1, n):
        s[t] = int(rng.random() < TWO[s[t - 1], 1])
    y = 0.2 + np.array([0.0, -1.5])[s] + np.sqrt(np.array([1.0, 2.0])[s]) * rng.standard_normal(n)
    fit = fit_kim(y, np.ones(n), TWO, mean_shift=True)
    assert fit.status == "ok"
    assert fit.params.m[0] == 0.0
    assert fit.params.m[1] == pytest.approx(-1.5, abs=0.3)


def test_transition_conventions():
    p_sm = np.array([[0.9, 0.2], [0.1, 0.8]])  # columns sum to one (statsmodels)
    rows = transition_from_statsmodels(p_sm)
    np.testing.assert_allclose(rows.sum(axis=1), 1.0)
    assert rows[0, 1] == 0.1  # P(S_t = 1 | S_{t-1} = 0)
    with pytest.raises(ValueError):  # the statsmodels matrix passed unconverted is caught
        KimParams.create(1e-9, [1.0, 2.0], p_sm)
    pi = stationary_distribution(TWO)
    np.testing.assert_allclose(pi @ TWO, pi, rtol=1e-12)
    np.testing.assert_allclose(pi, [0.05 / 0.07, 0.02 / 0.07], rtol=1e-12)


def test_params_and_state_round_trip_json():
    kp = KimParams.create(1e-9, [1.0, 3.0], TWO, [0.0, -1e-3])
    assert KimParams.from_dict(json.loads(json.dumps(kp.to_dict()))) == kp
    st = KimState.initial(kp)
    back = KimState.from_dict(json.loads(json.dumps(st.to_dict(), allow_nan=False)))
    assert back.diffuse and back.to_dict() == st.to_dict()


def test_too_little_data_is_a_result():
    fit = fit_kim(np.array([0.01, -0.01, 0.02]), np.full(3, 1e-4), TWO)
    assert fit.status == "too_little_data" and fit.params is None and np.isnan(fit.loglik)


def test_q_floor_is_a_bound_of_the_search():
    # A stated floor above the unconstrained estimate: the search ends on it, c is
    # estimated at the q used, and a constrained maximum cannot beat the free one.
    y, h, s, scale, q = _regime_simulation(seed=8)
    free = fit_kim(y, h, TWO)
    floor = max(free.params.q, 1e-12) * 50.0
    bound = fit_kim(y, h, TWO, q_min=floor)
    assert bound.status == "ok" and bound.params.q == floor
    assert "floor" in bound.message
    assert bound.loglik <= free.loglik + 1e-6
    # the same as holding q fixed at the floor (the maximum is on the bound)
    held = fit_kim(y, h, TWO, fixed_q=floor)
    np.testing.assert_allclose(bound.params.c, held.params.c, rtol=1e-3)
    # a floor below the estimate does not bind
    low = fit_kim(y, h, TWO, q_min=free.params.q / 50.0 if free.params.q > 0 else 1e-30)
    assert low.loglik == pytest.approx(free.loglik, abs=1e-3)


@pytest.mark.parametrize("prior", [None, FilterState.weak_prior(0.0, 1e-6)])
def test_compiled_likelihood_equals_the_interpreted_kernel(factor, prior):
    # the compiled twin (numba) of _kim_pass_two's summed log-likelihood, missing rows and
    # the diffuse start included; the interpreted kernel is the reference
    import math

    from tracker.estimation import kim_compiled
    from tracker.estimation.kim_filter import KimState, _kim_pass_two

    r, h = factor
    valid = np.isfinite(r) & np.isfinite(h)
    assert r.size >= kim_compiled.MIN_ROWS
    assert kim_compiled.compiled() is not None      # numba is a declared dependency
    for c, m in (((0.5, 2.0), (0.0, 0.0)), ((1.0, 4.0), (0.0, -2e-3))):
        par = KimParams.create(1e-9, c, TWO, m)
        st = KimState.initial(par, prior=prior)
        ll = _kim_pass_two(par, r, h, valid, st)[3]
        want = math.fsum(v for v in ll if v == v)
        got = kim_compiled.loglik_two(par, r, h, valid, st)
        assert got == pytest.approx(want, rel=1e-12)
        # every output of the compiled pass, row by row, and the end state
        ref = _kim_pass_two(par, r, h, valid, st)
        fast = kim_compiled.pass_two(par, r, h, valid, st)
        for a, b in zip(fast[:4], ref[:4]):
            np.testing.assert_allclose(np.asarray(a), np.asarray(b), rtol=1e-12, atol=0)
        np.testing.assert_allclose(np.concatenate(fast[4][:3]), np.concatenate(ref[4][:3]), rtol=1e-12)
        assert fast[4][3] == ref[4][3]
