"""Tests for the per-factor Markov-switching regime layer (tracker.estimation.markov_regimes)."""
import json
import math
import time

import numpy as np
import pytest
from statsmodels.tsa.regime_switching.markov_autoregression import MarkovAutoregression
from statsmodels.tsa.regime_switching.markov_regression import MarkovRegression

from tracker.estimation.markov_regimes import (
    MarkovRegimeModel,
    RegimeFilterState,
    RegimeParams,
    fit_best_of,
    forward_filter,
    forward_filter_loop,
    hamilton_filter,
    normal_logpdf_matrix,
    order_regimes,
    regime_moments,
    regression_param_vector,
)

# Hamilton (1989) US real GNP growth, 1951Q2-1984Q4 (quarterly, percent), copied from
# statsmodels' own tests: statsmodels/tsa/regime_switching/tests/test_markov_autoregression.py
# (the list named `rgnp` there).
RGNP = [2.59316421, 2.20217133, 0.45827562, 0.9687438,
    -0.24130757, 0.89647478, 2.05393219, 1.73353648,
    0.93871289, -0.46477833, -0.80983406, -1.39763689,
    -0.39886093, 1.1918416, 1.45620048, 2.11808228,
    1.08957863, 1.32390273, 0.87296367, -0.19773273,
    0.45420215, 0.07221876, 1.1030364, 0.82097489,
    -0.05795795, 0.58447772, -1.56192672, -2.05041027,
    0.53637183, 2.33676839, 2.34014559, 1.2339263,
    1.8869648, -0.45920792, 0.84940469, 1.70139849,
    -0.28756312, 0.09594627, -0.86080289, 1.03447127,
    1.23685944, 1.42004502, 2.22410631, 1.30210173,
    1.03517699, 0.9253425, -0.16559951, 1.3444382,
    1.37500131, 1.73222184, 0.71605635, 2.21032143,
    0.85333031, 1.00238776, 0.42725441, 2.14368343,
    1.43789184, 1.57959926, 2.27469826, 1.95962656,
    0.25992399, 1.01946914, 0.49016398, 0.5636338,
    0.5959546, 1.43082857, 0.56230122, 1.15388393,
    1.68722844, 0.77438205, -0.09647045, 1.39600146,
    0.13646798, 0.55223715, -0.39944872, -0.61671102,
    -0.08722561, 1.2101835, -0.90729755, 2.64916158,
    -0.0080694, 0.51111895, -0.00401437, 2.16821432,
    1.92586732, 1.03504717, 1.85897219, 2.32004929,
    0.25570789, -0.09855274, 0.89073682, -0.55896485,
    0.28350255, -1.31155407, -0.88278776, -1.97454941,
    1.01275265, 1.68264723, 1.38271284, 1.86073637,
    0.4447377, 0.41449001, 0.99202275, 1.36283576,
    1.59970522, 1.98845816, -0.25684232, 0.87786949,
    3.1095655, 0.85324478, 1.23337317, 0.00314302,
    -0.09433369, 0.89883322, -0.19036628, 0.99772376,
    -2.39120054, 0.06649673, 1.26136017, 1.91637838,
    -0.3348029, 0.44207108, -1.40664911, -1.52129889,
    0.29919869, -0.80197448, 0.15204792, 0.98585027,
    2.13034606, 1.34397924, 1.61550522, 2.70930099,
    1.24461412, 0.50835466, 0.14802167]


# Two-regime truth used by the simulation tests (daily-like decimal returns).
TRUE_MEANS = np.array([0.0005, -0.0010])
TRUE_VOLS = np.array([0.007, 0.020])
TRUE_P = np.array([[0.98, 0.02], [0.05, 0.95]])  # row-stochastic; durations 50 and 20


def simulate(rng, t_len, means, vols, transition):
    """Markov chain regimes s (T,) and returns y (T,) with known truth."""
    k = len(means)
    cum = np.cumsum(transition, axis=1)
    u = rng.random(t_len)
    s = np.zeros(t_len, dtype=int)
    for t in range(1, t_len):
        s[t] = min(int(np.searchsorted(cum[s[t - 1]], u[t], side="right")), k - 1)
    y = np.asarray(means)[s] + np.asarray(vols)[s] * rng.standard_normal(t_len)
    return y, s


def percent_params(means, vols, transition):
    return RegimeParams(len(means), np.asarray(means) * 100, (np.asarray(vols) * 100) ** 2,
                        transition)


@pytest.fixture(scope="module")
def sim2():
    return simulate(np.random.default_rng(20240611), 4000, TRUE_MEANS, TRUE_VOLS, TRUE_P)


@pytest.fixture(scope="module")
def fit_first(sim2):
    y, _ = sim2
    return MarkovRegimeModel().fit(y[:3000])


@pytest.fixture(scope="module")
def fit_full(sim2, fit_first):
    """Warm refit on the extended sample (one start: the previous parameters)."""
    y, _ = sim2
    return MarkovRegimeModel().fit(y, previous=fit_first.params)


@pytest.fixture(scope="module")
def fit_cold(sim2, fit_first):
    """Cold multi-start fit on the extended sample; previous used for labels only."""
    y, _ = sim2
    return MarkovRegimeModel().fit(y, previous=fit_first.params, warm_start=False)


# ---------------------------------------------------------------------------
# Hamilton filter against statsmodels (reference library) and its slow twin
# ---------------------------------------------------------------------------
@pytest.mark.parametrize("k", [2, 3])
def test_filter_equals_statsmodels_at_same_params(k):
    # Reference: statsmodels MarkovRegression.filter (its Cython Hamilton filter),
    # steady-state initialization, same parameters. Tolerance 1e-8.
    rng = np.random.default_rng(11 + k)
    means = np.array([0.0005, -0.001, -0.003])[:k]
    vols = np.array([0.007, 0.015, 0.03])[:k]
    trans = np.full((k, k), 0.03 / (k - 1)) + np.diag(np.full(k, 0.97 - 0.03 / (k - 1)))
    trans[0] = np.r_[0.99, np.full(k - 1, 0.01 / (k - 1))]
    y, _ = simulate(rng, 2500, means, vols, trans)
    p = percent_params(means, vols, trans)
    mod = MarkovRegression(y * 100, k_regimes=k, trend="c", switching_variance=True)
    ref = mod.filter(regression_param_vector(mod, p.means, p.variances, p.transition))

    ours = hamilton_filter(y * 100, p)
    np.testing.assert_allclose(ours.filtered, ref.filtered_marginal_probabilities, atol=1e-8)
    assert ours.loglik == pytest.approx(ref.llf, rel=1e-10, abs=1e-8)
    np.testing.assert_allclose(ours.loglik_t, ref.llf_obs, atol=1e-8)
    # statsmodels' predicted_marginal_probabilities[t] = P(S_t | data to t-1) = our predicted[t-1].
    np.testing.assert_allclose(ours.predicted[:-1], ref.predicted_marginal_probabilities[1:],
                               atol=1e-8)
    np.testing.assert_allclose(ours.predicted, ours.filtered @ p.transition, atol=1e-14)


def test_regime_moments_roundtrip_statsmodels_layout():
    rng = np.random.default_rng(3)
    mod = MarkovRegression(rng.standard_normal(50), k_regimes=3, trend="c",
                           switching_variance=True)
    trans = np.array([[0.9, 0.06, 0.04], [0.1, 0.8, 0.1], [0.05, 0.15, 0.8]])
    vec = regression_param_vector(mod, [1.0, 2.0, 3.0], [0.5, 1.5, 2.5], trans)
    m, v, t = regime_moments(mod, vec)
    np.testing.assert_allclose(m, [1, 2, 3])
    np.testing.assert_allclose(v, [0.5, 1.5, 2.5])
    np.testing.assert_allclose(t, trans, atol=1e-15)
    # statsmodels documents its matrix as column-stochastic: [i, j] = P(j -> i).
    np.testing.assert_allclose(mod.regime_transition_matrix(vec)[:, :, 0], trans.T, atol=1e-15)


def test_initialize_known_is_two_periods_before_first_row():
    # statsmodels trap (DESIGN.md): initialize_known(p) fixes the regime distribution two
    # periods before the first row for MarkovRegression, i.e. P(S_0) = p P P.
    rng = np.random.default_rng(5)
    y = rng.standard_normal(60)
    trans = np.array([[0.9, 0.1], [0.3, 0.7]])
    p0 = np.array([0.2, 0.8])
    params = RegimeParams(2, [0.1, -0.2], [0.5, 2.0], trans)
    mod = MarkovRegression(y, k_regimes=2, trend="c", switching_variance=True)
    mod.initialize_known(p0)
    ref = mod.filter(regression_param_vector(mod, params.means, params.variances, trans))
    ours = hamilton_filter(y, params, RegimeFilterState.start(p0 @ trans @ trans))
    np.testing.assert_allclose(ours.filtered, ref.filtered_marginal_probabilities, atol=1e-10)
    assert ours.loglik == pytest.approx(ref.llf, abs=1e-10)
    naive = hamilton_filter(y, params, RegimeFilterState.start(p0))
    assert abs(naive.filtered[0, 0] - ref.filtered_marginal_probabilities[0, 0]) > 1e-3


@pytest.mark.parametrize("k", [2, 3])
def test_fast_kernel_equals_plain_loop(k):
    # Reference twin: the plain one-row-at-a-time recursion.
    rng = np.random.default_rng(7)
    t_len = 5000
    ld = normal_logpdf_matrix(rng.standard_t(4, t_len), np.linspace(0, 0.2, k),
                              np.linspace(0.3, 4.0, k))
    ld[100:110] = 0.0  # missing rows
    ld[2000, 0] -= 400.0  # a huge outlier for one regime
    trans = rng.dirichlet(np.ones(k), size=k) * 0.1 + np.eye(k) * 0.9
    p0 = np.full(k, 1.0 / k)
    fast = forward_filter(ld, trans, p0)
    slow = forward_filter_loop(ld, trans, p0)
    for a, b in zip(fast, slow):
        np.testing.assert_allclose(a, b, rtol=1e-12, atol=1e-13)


def test_missing_rows_only_apply_the_transition():
    params = RegimeParams(2, [0.0, 0.0], [1.0, 4.0], TRUE_P)
    y = np.array([0.1, -3.0, np.nan, np.nan, 0.2])
    out = hamilton_filter(y, params)
    np.testing.assert_allclose(out.filtered[2], out.filtered[1] @ TRUE_P, atol=1e-15)
    np.testing.assert_allclose(out.filtered[3], out.filtered[1] @ TRUE_P @ TRUE_P, atol=1e-15)
    assert out.loglik_t[2] == 0.0 and out.loglik_t[3] == 0.0


def test_incremental_filter_from_json_state_equals_full_run():
    rng = np.random.default_rng(9)
    y, _ = simulate(rng, 3000, TRUE_MEANS, TRUE_VOLS, TRUE_P)
    params = RegimeParams(2, TRUE_MEANS, TRUE_VOLS**2, TRUE_P)
    full = hamilton_filter(y, params)
    first = hamilton_filter(y[:2000], params)
    state = RegimeFilterState.from_dict(json.loads(json.dumps(first.state.to_dict())))
    params2 = RegimeParams.from_dict(json.loads(json.dumps(params.to_dict())))
    rest = hamilton_filter(y[2000:], params2, state)
    np.testing.assert_allclose(rest.filtered, full.filtered[2000:], atol=1e-13)
    np.testing.assert_allclose(rest.predicted, full.predicted[2000:], atol=1e-13)
    assert rest.state.n_obs == 3000
    assert rest.state.loglik == pytest.approx(full.loglik, rel=1e-12)
    # one row at a time gives the same end state
    st = first.state
    for v in y[2000:2010]:
        st = hamilton_filter([v], params, st).state
    np.testing.assert_allclose(st.filtered, full.filtered[2009], atol=1e-13)


def test_loglik_units_decimal_vs_percent():
    # Change of variables: log f(y) = log f(100 y) + log(100) per row.
    rng = np.random.default_rng(2)
    y, _ = simulate(rng, 500, TRUE_MEANS, TRUE_VOLS, TRUE_P)
    dec = hamilton_filter(y, RegimeParams(2, TRUE_MEANS, TRUE_VOLS**2, TRUE_P))
    pct = hamilton_filter(100 * y, percent_params(TRUE_MEANS, TRUE_VOLS, TRUE_P))
    assert dec.loglik == pytest.approx(pct.loglik + 500 * math.log(100), rel=1e-12)
    np.testing.assert_allclose(dec.filtered, pct.filtered, atol=1e-12)


def test_params_json_roundtrip_and_derived_quantities():
    p = RegimeParams(2, TRUE_MEANS, TRUE_VOLS**2, TRUE_P)
    q = RegimeParams.from_dict(json.loads(json.dumps(p.to_dict())))
    np.testing.assert_array_equal(q.transition, p.transition)
    np.testing.assert_array_equal(q.variances, p.variances)
    assert q.convention == p.convention and "S_{t+1}=j | S_t=i" in q.convention
    np.testing.assert_allclose(p.durations, [50.0, 20.0])
    np.testing.assert_allclose(p.stationary @ TRUE_P, p.stationary, atol=1e-14)
    np.testing.assert_allclose(p.stationary, [5 / 7, 2 / 7], atol=1e-12)
    with pytest.raises(ValueError):
        RegimeParams(2, [0.0], [1.0, 1.0], TRUE_P)
    assert not p.means.flags.writeable


# ---------------------------------------------------------------------------
# Regime ordering and label stability
# ---------------------------------------------------------------------------
def test_order_by_volatility_and_ties():
    assert order_regimes([2.0, 1.0, 3.0], [0.0, 0.0, 0.0])[0] == (1, 0, 2)
    # tied volatility (within 5%): higher mean first without a previous fit
    assert order_regimes([1.0, 1.02], [-1.0, 1.0])[0] == (1, 0)
    # ...but the previous fit decides when given (raw 0 looks like previous regime 0)
    order, match = order_regimes([1.0, 1.02], [-1.0, 1.0], distance=[[0.0, 5.0], [5.0, 0.0]])
    assert order == (0, 1) and match == (0, 1)
    # distinct volatilities: volatility wins, and the crossing is reported
    order, match = order_regimes([1.0, 2.0], [0.0, 0.0], distance=[[5.0, 0.0], [0.0, 5.0]])
    assert order == (0, 1) and match == (1, 0)


def test_relabel_stability_on_refit(fit_first, fit_full):
    assert fit_first.ok and fit_full.ok
    # Labels keep their meaning: regime k of the refit is closest to regime k before.
    assert fit_full.previous_match == (0, 1)
    assert fit_full.warnings == ()
    np.testing.assert_allclose(fit_full.params.vols, fit_first.params.vols, rtol=0.15)
    assert fit_full.params.vols[0] < fit_full.params.vols[1]
    # and the calm label is the calm truth
    np.testing.assert_allclose(fit_full.params.vols, TRUE_VOLS, rtol=0.1)


def test_crossing_against_previous_is_reported(sim2, fit_first):
    # A previous fit whose labels mean the opposite (volatile first): the refit keeps
    # calm = 0 and says which previous regime each new one resembles.
    y, _ = sim2
    p = fit_first.params
    flipped = RegimeParams(2, p.means[::-1], p.variances[::-1], p.transition[::-1, ::-1])
    fit = MarkovRegimeModel().fit(y[:3000], previous=flipped)
    assert fit.ok
    assert fit.params.vols[0] < fit.params.vols[1]
    assert fit.previous_match == (1, 0)
    assert any("0->1" in w and "1->0" in w for w in fit.warnings)


def test_labels_do_not_depend_on_the_seed(sim2, fit_first):
    y, _ = sim2
    other = MarkovRegimeModel(seed=12345).fit(y[:3000])
    assert other.ok
    np.testing.assert_allclose(other.params.vols, fit_first.params.vols, rtol=1e-3)
    np.testing.assert_allclose(other.params.transition, fit_first.params.transition, atol=1e-3)


def test_warm_start_does_not_lose_likelihood(fit_full, fit_cold):
    assert fit_full.ok and fit_cold.ok
    # a warm EM refit starts from the previous optimum and from statsmodels' default start
    assert fit_full.n_starts == 2 and fit_cold.n_starts == 3
    assert fit_full.loglik >= fit_cold.loglik - 1e-4
    np.testing.assert_allclose(fit_full.params.means, fit_cold.params.means, atol=2e-5)
    np.testing.assert_allclose(fit_full.params.vols, fit_cold.params.vols, rtol=1e-3)
    assert fit_cold.previous_match == (0, 1)


# ---------------------------------------------------------------------------
# External check: Hamilton (1989) GNP model through the same multi-start path
# ---------------------------------------------------------------------------
def test_hamilton_gnp_reference_through_multistart_path():
    # Reference values: Hamilton (1989) model as estimated in statsmodels'
    # test_markov_autoregression.py::TestHamiltonAR4 (E-views results there):
    # P(recession->recession) 0.754673, P(expansion->recession) 0.095915,
    # means -0.358811 / 1.163516, log-likelihood -181.26339. Tolerance 1e-3.
    mod = MarkovAutoregression(np.array(RGNP), k_regimes=2, order=4, switching_ar=False)
    best = fit_best_of(mod, [None, None, None], np.random.default_rng(0))
    assert best.converged
    means, variances, trans = regime_moments(mod, best.params)
    order, _ = order_regimes(np.sqrt(variances), means)  # equal variances: higher mean first
    o = list(order)
    means, trans = means[o], trans[np.ix_(o, o)]
    assert means[0] == pytest.approx(1.163516, abs=1e-3)
    assert means[1] == pytest.approx(-0.358811, abs=1e-3)
    assert trans[0, 0] == pytest.approx(1 - 0.095915, abs=1e-3)
    assert trans[1, 1] == pytest.approx(0.754673, abs=1e-3)
    assert best.llf == pytest.approx(-181.26339, abs=1e-3)


# ---------------------------------------------------------------------------
# Estimator on a seeded simulation with known truth
# ---------------------------------------------------------------------------
def test_fit_recovers_simulated_regimes(sim2, fit_cold):
    y, s = sim2
    fit = fit_cold
    assert fit.ok and fit.converged and fit.status == "ok"
    hit = np.mean(fit.filtered.most_likely == s)
    calm_share = np.mean(s == 0)
    # filtered (real-time) regime matches the truth on most days, well above always-calm
    assert hit >= 0.85 and hit > calm_share + 0.1
    # ~57 spells of each regime: duration s.e. ~13%; 30% is about 2.3 s.e.
    np.testing.assert_allclose(fit.durations, 1 / (1 - np.diag(TRUE_P)), rtol=0.30)
    np.testing.assert_allclose(fit.params.means, TRUE_MEANS, atol=5e-4)
    assert fit.params.transition.sum(axis=1) == pytest.approx([1.0, 1.0])
    assert len(fit.start_logliks) == fit.n_starts == 3
    # our real-time output at the fitted params equals statsmodels' filter
    mod = MarkovRegression(100 * y, k_regimes=2, trend="c", switching_variance=True)
    pp = fit.params
    ref = mod.filter(regression_param_vector(mod, pp.means * 100, pp.variances * 1e4,
                                             pp.transition))
    np.testing.assert_allclose(fit.filtered.filtered, ref.filtered_marginal_probabilities,
                               atol=1e-8)
    assert fit.loglik == pytest.approx(ref.llf + len(y) * math.log(100), rel=1e-10)
    assert fit.bic == pytest.approx(-2 * fit.loglik + 6 * math.log(len(y)))


def test_fit_state_resumes_on_new_rows(sim2, fit_first):
    y, _ = sim2
    resumed = MarkovRegimeModel.filter(y[3000:], fit_first.params, fit_first.filtered.state)
    direct = hamilton_filter(y, fit_first.params)
    np.testing.assert_allclose(resumed.filtered, direct.filtered[3000:], atol=1e-12)


# ---------------------------------------------------------------------------
# Failures are results
# ---------------------------------------------------------------------------
def _assert_no_numbers(fit):
    assert np.all(np.isnan(fit.params.means)) and np.all(np.isnan(fit.params.transition))
    assert math.isnan(fit.loglik) and math.isnan(fit.bic)
    assert fit.filtered is None and not fit.converged
    assert fit.message


def test_too_little_data():
    fit = MarkovRegimeModel().fit(np.random.default_rng(0).normal(0, 0.01, 50))
    assert fit.status == "too_little_data"
    _assert_no_numbers(fit)


def test_nan_input_fails_cleanly():
    y = np.random.default_rng(0).normal(0, 0.01, 500)
    y[10] = np.nan
    fit = MarkovRegimeModel().fit(y)
    assert fit.status == "failed"
    _assert_no_numbers(fit)


def test_iteration_cap_is_not_converged(sim2):
    y, _ = sim2
    fit = MarkovRegimeModel(maxiter=1, n_starts=1).fit(y[:2000])
    assert fit.status == "not_converged"
    _assert_no_numbers(fit)


def test_stale_values_are_unidentified():
    # 30% exact zeros (stale prices): a zero-variance regime makes the likelihood unbounded.
    rng = np.random.default_rng(4)
    y = rng.normal(0, 0.01, 800)
    y[rng.random(800) < 0.3] = 0.0
    fit = MarkovRegimeModel(n_starts=2).fit(y)
    assert fit.status == "unidentified"
    assert "stale" in fit.message
    _assert_no_numbers(fit)
    # With the data check switched off the optimizer meets the collapse itself.
    fit = MarkovRegimeModel(n_starts=3, max_repeat_share=1.0).fit(y)
    assert fit.status == "unidentified"
    assert "variance" in fit.message
    _assert_no_numbers(fit)


def test_iid_normal_has_no_regimes():
    fit = MarkovRegimeModel(n_starts=2).fit(np.random.default_rng(8).normal(0, 0.01, 1000))
    assert fit.status == "unidentified"
    _assert_no_numbers(fit)


@pytest.mark.slow
def test_three_regimes_on_three_regime_simulation():
    means = np.array([0.0006, -0.0002, -0.002])
    vols = np.array([0.006, 0.012, 0.03])
    trans = np.array([[0.985, 0.012, 0.003], [0.02, 0.97, 0.01], [0.02, 0.03, 0.95]])
    y, s = simulate(np.random.default_rng(31), 5000, means, vols, trans)
    fit = MarkovRegimeModel(3).fit(y)
    assert fit.ok
    np.testing.assert_allclose(fit.params.vols, vols, rtol=0.15)
    assert np.mean(fit.filtered.most_likely == s) >= 0.8


@pytest.mark.slow
def test_filter_speed_15000_rows():
    # Performance target of this layer: T = 15,000, K = 2..3 in a few milliseconds.
    rng = np.random.default_rng(1)
    for k in (2, 3):
        y = rng.normal(0, 0.01, 15000)
        trans = np.full((k, k), 0.01 / (k - 1)) + np.eye(k) * (0.99 - 0.01 / (k - 1))
        params = RegimeParams(k, np.zeros(k), np.linspace(0.5, 2, k) * 1e-4, trans)
        times = []
        for _ in range(7):
            t0 = time.perf_counter()
            hamilton_filter(y, params)
            times.append(time.perf_counter() - t0)
        assert np.median(times) < 0.025
