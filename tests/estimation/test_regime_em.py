"""The batched EM kernel for Markov-switching mean and variance (tracker.estimation.regime_em).

Reference twins: statsmodels ``MarkovRegression`` (smoothed probabilities, log-likelihood
and maximised log-likelihood) and a plain row-by-row recursion. Published values: the
Federal funds rate model of Stata's ``mswitch`` manual as reproduced in statsmodels'
own tests (statsmodels/tsa/regime_switching/tests/test_markov_regression.py,
``TestFedFundsConst``: log-likelihood -508.63592 at the published parameters).
"""
import warnings

import numpy as np
import pytest
from statsmodels.tsa.regime_switching.markov_regression import MarkovRegression

from tracker.estimation import regime_em as em
from tracker.estimation.markov_regimes import MarkovRegimeModel, regime_moments

fed = pytest.importorskip("statsmodels.tsa.regime_switching.tests.test_markov_regression")
FEDFUNDS = np.asarray(fed.fedfunds, float)


def _simulate(seed: int, t_len: int, stay=(0.99, 0.98)):
    rng = np.random.default_rng(seed)
    s = np.zeros(t_len, int)
    u = rng.random(t_len)
    for t in range(1, t_len):
        s[t] = s[t - 1] if u[t] < stay[s[t - 1]] else 1 - s[t - 1]
    y = np.where(s == 0, 0.0004 + 0.006 * rng.standard_normal(t_len),
                 -0.0003 + 0.016 * rng.standard_normal(t_len))
    return y, s


def _sm_fit(y, **kw):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        mod = MarkovRegression(y, k_regimes=2, trend="c", switching_variance=True)
        return mod, mod.fit(disp=False, **kw)


def test_loglik_matches_the_published_fedfunds_value():
    # Stata mswitch manual / statsmodels TestFedFundsConst: switching mean, one variance.
    # statsmodels' vector: p[0->0], p[1->0], const0, const1, sigma2 (column-stochastic).
    p00, p10, m0, m1, s2 = 0.9820939, 0.0503587, 3.70877, 9.556793, 2.107562**2
    trans = np.array([[[p00, 1 - p00], [p10, 1 - p10]]])
    ll = em.exact_loglik(FEDFUNDS, [[m0, m1]], [[s2, s2]], trans)
    _, _, ll_es = em.e_step(FEDFUNDS, np.array([[m0, m1]]), np.array([[s2, s2]]), trans)
    # published to 5 decimals; the statsmodels test uses atol 1e-5
    assert ll[0] == pytest.approx(-508.63592, abs=1e-4)
    assert ll_es[0] == pytest.approx(ll[0], rel=1e-12)


@pytest.mark.parametrize("compiled", [True, False], ids=["compiled", "numpy"])
def test_smoothed_probabilities_match_statsmodels_at_fixed_parameters(compiled):
    y, _ = _simulate(1, 3000)
    mod = MarkovRegression(y * 100, k_regimes=2, trend="c", switching_variance=True)
    means, variances, trans = regime_moments(mod, mod.start_params)
    gamma, xi, ll = em.e_step(y * 100, means[None], variances[None], trans[None], compiled=compiled)
    res = mod.smooth(mod.start_params)
    np.testing.assert_allclose(gamma[0], res.smoothed_marginal_probabilities, atol=1e-10)
    assert ll[0] == pytest.approx(res.llf, rel=1e-12)
    # summed pairwise probabilities: statsmodels' smoothed joint probabilities are
    # indexed [S_t, S_{t-1}, t]; at t = 0 the pair is with the unobserved S_{-1}
    joint = np.asarray(res.smoothed_joint_probabilities)
    np.testing.assert_allclose(xi[0], joint[:, :, 1:].sum(axis=2).T, rtol=1e-8)


def test_compiled_e_step_matches_the_numpy_twin():
    # tracker.estimation.regime_em_compiled (row-by-row, scaled) against the blocked numpy
    # products, several starts at once, on a long and a short series (the short one below
    # the length where the service switches to the compiled kernel)
    from tracker.estimation import regime_em_compiled

    assert regime_em_compiled.kernel() is not None        # numba is a declared dependency
    for t_len, seed in ((5000, 4), (120, 5)):
        y, _ = _simulate(seed, t_len)
        y = y * 100
        rng = np.random.default_rng(seed)
        means = np.mean(y) + 0.2 * rng.standard_normal((4, 2))
        variances = np.var(y) * rng.uniform(0.2, 3.0, (4, 2))
        stay = rng.uniform(0.8, 0.999, (4, 2))
        trans = np.stack([np.array([[a, 1 - a], [1 - b, b]]) for a, b in stay])
        g0, x0, l0 = em.e_step(y, means, variances, trans, compiled=False)
        g1, x1, l1 = regime_em_compiled.e_step(y, means, variances, trans, em.stationary_batch(trans))
        np.testing.assert_allclose(g1, g0, rtol=1e-9, atol=1e-12)
        np.testing.assert_allclose(x1, x0, rtol=1e-9)
        np.testing.assert_allclose(l1, l0, rtol=1e-11)


def test_blocked_products_match_a_plain_recursion():
    rng = np.random.default_rng(3)
    g = rng.uniform(0.01, 1.0, size=(3, 777, 2, 2))
    v0 = np.array([[0.3, 0.7], [0.5, 0.5], [0.9, 0.1]])
    out = em._prefix(g, v0)
    for s in range(3):
        v = v0[s]
        for t in range(777):
            v = v @ g[s, t]
            v = v / v.sum()
            np.testing.assert_allclose(out[s, t + 1], v, rtol=1e-11)


@pytest.mark.parametrize("seed,t_len", [(2, 1500), (5, 6500)])
def test_em_reaches_the_statsmodels_optimum(seed, t_len):
    # reference: statsmodels' default fit (EM steps then BFGS) from its default start
    y, _ = _simulate(seed, t_len)
    mod, ref = _sm_fit(y)
    means, variances, trans = regime_moments(mod, mod.start_params)
    res = em.fit_em(y, means[None], variances[None], trans[None],
                    variance_floor=1e-4 * np.var(y))
    assert res.converged[0] and not res.degenerate[0]
    # the target: no worse than the naive fit, 1e-6 relative
    assert res.loglik[0] >= ref.llf - 1e-6 * abs(ref.llf)
    m_ref, v_ref, p_ref = regime_moments(mod, ref.params)
    order = np.argsort(res.variances[0])
    ref_order = np.argsort(v_ref)
    np.testing.assert_allclose(res.variances[0][order], v_ref[ref_order], rtol=1e-4)
    np.testing.assert_allclose(res.means[0][order], m_ref[ref_order], atol=1e-6)
    np.testing.assert_allclose(res.transition[0][np.ix_(order, order)],
                               p_ref[np.ix_(ref_order, ref_order)], atol=1e-4)


def test_em_never_lowers_the_likelihood_and_counts_its_steps():
    y, _ = _simulate(7, 2000)
    start_m = np.array([[0.0, 0.0], [0.001, -0.001]])
    start_v = np.array([[1e-5, 4e-4], [5e-5, 1e-4]])
    start_p = np.array([[[0.9, 0.1], [0.1, 0.9]], [[0.99, 0.01], [0.05, 0.95]]])
    before = em.exact_loglik(y, start_m, start_v, start_p)
    lls = []
    for cap in (3, 6, 30):
        r = em.fit_em(y, start_m, start_v, start_p, max_iter=cap)
        assert np.all(r.n_iter <= cap)
        lls.append(r.loglik)
    assert np.all(lls[0] >= before - 1e-9)
    assert np.all(lls[1] >= lls[0] - 1e-9) and np.all(lls[2] >= lls[1] - 1e-9)


def test_exact_transition_step_beats_the_counts_solution():
    # the M step for P under the stationary start: the Newton solution's objective is at
    # least the closed-form counts solution's, and both are row-stochastic
    rng = np.random.default_rng(11)
    xi = rng.uniform(1, 50, size=(20, 2, 2)) * np.array([[30, 1], [1, 20]])
    g0 = rng.dirichlet([1, 1], size=20)
    counts = xi / xi.sum(axis=2, keepdims=True)
    exact = em._transition_two(xi, g0, counts, 1e-8)

    def objective(p):
        pi = em.stationary_batch(p)
        return (xi * np.log(p)).sum(axis=(1, 2)) + (g0 * np.log(pi)).sum(axis=1)

    assert np.all(objective(exact) >= objective(counts) - 1e-12)
    assert np.any(objective(exact) > objective(counts) + 1e-9)
    np.testing.assert_allclose(exact.sum(axis=2), 1.0, atol=1e-12)


def test_a_collapsing_regime_is_flagged_degenerate():
    rng = np.random.default_rng(4)
    y = rng.normal(0, 0.01, 800)
    y[rng.random(800) < 0.3] = 0.0                       # stale prices
    floor = 1e-4 * np.var(y)
    r = em.fit_em(y, [[0.0, 0.0]], [[1e-6, 1e-4]], [[[0.7, 0.3], [0.3, 0.7]]],
                  variance_floor=floor)
    assert r.degenerate[0]


def test_model_engines_agree():
    # the service's regime model with the EM engine against the statsmodels engine
    y, _ = _simulate(9, 4000)
    a = MarkovRegimeModel(n_starts=3, engine="em").fit(y)
    b = MarkovRegimeModel(n_starts=3, engine="statsmodels").fit(y)
    assert a.ok and b.ok
    assert a.loglik >= b.loglik - 1e-6 * abs(b.loglik)
    np.testing.assert_allclose(a.params.vols, b.params.vols, rtol=1e-3)
    np.testing.assert_allclose(a.params.transition, b.params.transition, atol=1e-3)


@pytest.mark.parametrize("compiled", [True, False], ids=["compiled", "numpy"])
def test_near_absorbing_chain_on_a_long_series_stays_finite(compiled):
    # Regression (found in review): with transition probabilities at the EM's floor
    # (1e-8) and data that alternate between very different regimes, unscaled block
    # products underflowed to zero on long series (T = 40,000: NaN log-likelihood).
    # Reference: the plain row-by-row forward recursion (forward-only log-likelihood).
    t_len = 40_000
    y = np.where(np.arange(t_len) % 2 == 0, 0.0, 30.0)
    means, variances = np.array([[0.0, 0.0]]), np.array([[1e-4, 100.0]])
    trans = np.array([[[1 - 1e-8, 1e-8], [1e-8, 1 - 1e-8]]])
    gamma, xi, ll = em.e_step(y, means, variances, trans, compiled=compiled)
    assert np.all(np.isfinite(gamma)) and np.all(np.isfinite(xi)) and np.isfinite(ll[0])
    from tracker.estimation.markov_regimes import forward_filter_loop, normal_logpdf_matrix

    log_d = normal_logpdf_matrix(y, means[0], variances[0])
    _, _, ll_t = forward_filter_loop(log_d, trans[0], em.stationary_batch(trans)[0])
    assert ll[0] == pytest.approx(ll_t.sum(), rel=1e-9)
