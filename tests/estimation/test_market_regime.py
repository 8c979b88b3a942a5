"""Tests for the joint market regime HMM (tracker.estimation.market_regime)."""
import json
import logging
import math

import numpy as np
import pytest
from hmmlearn.hmm import GaussianHMM

from tracker.estimation.market_regime import (
    MarketRegimeModel,
    MarketRegimeParams,
    em_converged,
    market_filter,
    mvn_logpdf_matrix,
    n_free_parameters,
)
from tracker.estimation.markov_regimes import RegimeFilterState

# Three-state truth: calm / choppy / stressed, daily persistence 0.98-0.99,
# volatility and correlation rising with stress (common practice for equity factors).
TRUE_P = np.array([[0.990, 0.008, 0.002],
                   [0.010, 0.980, 0.010],
                   [0.005, 0.015, 0.980]])
TRUE_VOL = np.array([0.006, 0.011, 0.022])
TRUE_RHO = np.array([0.2, 0.4, 0.7])
TRUE_MU = np.array([0.0005, 0.0, -0.0015])


def simulate_market(rng, t_len, n):
    """Regimes s (T,) and factor returns x (T, N) with known truth."""
    cum = np.cumsum(TRUE_P, axis=1)
    u = rng.random(t_len)
    s = np.zeros(t_len, dtype=int)
    for t in range(1, t_len):
        s[t] = min(int(np.searchsorted(cum[s[t - 1]], u[t], side="right")), 2)
    load = rng.uniform(0.7, 1.3, n)
    x = np.empty((t_len, n))
    for k in range(3):
        corr = TRUE_RHO[k] + (1 - TRUE_RHO[k]) * np.eye(n)
        cov = TRUE_VOL[k] ** 2 * corr * np.outer(load, load)
        idx = s == k
        x[idx] = rng.multivariate_normal(TRUE_MU[k] * load, cov, idx.sum())
    return x, s


@pytest.fixture(scope="module")
def market_sim():
    return simulate_market(np.random.default_rng(77), 3000, 8)


@pytest.fixture(scope="module")
def market_fit(market_sim):
    x, _ = market_sim
    return MarketRegimeModel().fit(x, columns=[f"f{i}" for i in range(8)])


def random_params(rng, k, n, covariance_type):
    means = rng.normal(0, 0.001, (k, n))
    if covariance_type == "full":
        a = rng.normal(0, 0.01, (k, n, n))
        covars = a @ np.transpose(a, (0, 2, 1)) / n + 1e-5 * np.eye(n)
    else:
        covars = rng.uniform(0.5e-4, 4e-4, (k, n))
    trans = rng.dirichlet(np.ones(k), size=k) * 0.1 + 0.9 * np.eye(k)
    start = rng.dirichlet(np.ones(k))
    return MarketRegimeParams(k, means, covars, covariance_type, trans, start)


def as_hmmlearn(p):
    hmm = GaussianHMM(n_components=p.n_states, covariance_type=p.covariance_type)
    hmm.startprob_ = np.array(p.startprob)
    hmm.transmat_ = np.array(p.transition)
    hmm.means_ = np.array(p.means)
    hmm.covars_ = np.array(p.covars)
    return hmm


# ---------------------------------------------------------------------------
# Forward filter against hmmlearn (reference library)
# ---------------------------------------------------------------------------
@pytest.mark.parametrize("covariance_type", ["full", "diag"])
def test_forward_filter_loglik_equals_hmmlearn_score(covariance_type):
    # Reference: hmmlearn GaussianHMM.score at the same parameters; tolerance 1e-8 relative.
    rng = np.random.default_rng(5)
    p = random_params(rng, 3, 5, covariance_type)
    hmm = as_hmmlearn(p)
    x, _ = hmm.sample(1500, random_state=3)
    ours = market_filter(x, p)
    assert ours.loglik == pytest.approx(hmm.score(x), rel=1e-8)
    # The smoothed probability of the last row is the filtered one, so hmmlearn's
    # posteriors on a prefix give the filter's answer at the prefix end.
    for t in (0, 10, 700, 1499):
        _, post = hmm.score_samples(x[: t + 1])
        np.testing.assert_allclose(ours.filtered[t], post[-1], atol=1e-8)
    np.testing.assert_allclose(ours.predicted, ours.filtered @ p.transition, atol=1e-14)


def test_densities_equal_scipy_multivariate_normal():
    from scipy.stats import multivariate_normal
    rng = np.random.default_rng(6)
    p = random_params(rng, 2, 4, "full")
    x = rng.normal(0, 0.01, (50, 4))
    ld = mvn_logpdf_matrix(x, p.means, p.covars, "full")
    for k in range(2):
        ref = multivariate_normal(p.means[k], p.covars[k]).logpdf(x)
        np.testing.assert_allclose(ld[:, k], ref, rtol=1e-12)


def test_incremental_filter_from_json_state():
    rng = np.random.default_rng(8)
    p = random_params(rng, 3, 4, "full")
    x, _ = as_hmmlearn(p).sample(1200, random_state=1)
    full = market_filter(x, p)
    first = market_filter(x[:900], p)
    state = RegimeFilterState.from_dict(json.loads(json.dumps(first.state.to_dict())))
    p2 = MarketRegimeParams.from_dict(json.loads(json.dumps(p.to_dict())))
    rest = market_filter(x[900:], p2, state)
    np.testing.assert_allclose(rest.filtered, full.filtered[900:], atol=1e-12)
    assert rest.state.loglik == pytest.approx(full.loglik, rel=1e-12)
    assert rest.state.n_obs == 1200


def test_parameter_count_matches_hmmlearn():
    # Reference: hmmlearn's own count (_get_n_fit_scalars_per_param) used by its bic().
    for ct in ("full", "diag"):
        for k, n in ((2, 1), (3, 8), (4, 10)):
            hmm = GaussianHMM(n_components=k, covariance_type=ct)
            hmm.n_features = n
            assert n_free_parameters(k, n, ct) == sum(hmm._get_n_fit_scalars_per_param().values())
    assert n_free_parameters(3, 8, "full") == 2 + 6 + 24 + 108


# ---------------------------------------------------------------------------
# Simulation with known truth
# ---------------------------------------------------------------------------
def test_bic_picks_three_states_and_filter_tracks_truth(market_sim, market_fit):
    x, s = market_sim
    fit = market_fit
    assert fit.ok and fit.converged
    assert fit.n_states == 3
    bic = fit.bic_by_states
    assert bic[3] < bic[2] and bic[3] < bic[4]
    hit = np.mean(fit.filtered.most_likely[50:] == s[50:])
    assert hit >= 0.85
    # calmest first, by total volatility
    assert np.all(np.diff(fit.params.total_vol) > 0)
    # truth: total vol sqrt(sum_i load_i^2) * vol_k, so ratios follow TRUE_VOL
    np.testing.assert_allclose(fit.params.total_vol / fit.params.total_vol[0],
                               TRUE_VOL / TRUE_VOL[0], rtol=0.1)
    # Only 8-11 spells per state in this sample, so compare with the transition
    # frequencies the sample actually realised: persistence within 0.003, durations 25%.
    counts = np.zeros((3, 3))
    np.add.at(counts, (s[:-1], s[1:]), 1)
    realised = counts / counts.sum(axis=1, keepdims=True)
    np.testing.assert_allclose(np.diag(fit.params.transition), np.diag(realised), atol=0.003)
    np.testing.assert_allclose(fit.params.durations, 1 / (1 - np.diag(realised)), rtol=0.25)
    assert fit.params.columns == tuple(f"f{i}" for i in range(8))


def test_fit_bic_and_loglik_equal_hmmlearn_at_fitted_params(market_sim, market_fit):
    # Reference: hmmlearn bic()/score() on the decimal data at our (decimal) parameters.
    x, _ = market_sim
    hmm = as_hmmlearn(market_fit.params)
    assert market_fit.loglik == pytest.approx(hmm.score(x), rel=1e-8)
    assert market_fit.bic == pytest.approx(hmm.bic(x), rel=1e-8)
    chosen = [c for c in market_fit.candidates if c.n_states == 3][0]
    assert chosen.bic == pytest.approx(market_fit.bic, rel=1e-8)


def test_labels_stable_on_refit(market_sim, market_fit):
    x, _ = market_sim
    more = simulate_market(np.random.default_rng(78), 500, 8)[0]
    refit = MarketRegimeModel(states=(3,)).fit(np.vstack([x, more]), previous=market_fit.params)
    assert refit.ok
    assert refit.previous_match == (0, 1, 2)
    np.testing.assert_allclose(refit.params.total_vol, market_fit.params.total_vol, rtol=0.1)


def test_filter_state_continues_fit(market_sim, market_fit):
    x, _ = market_sim
    resumed = MarketRegimeModel.filter(x[-100:], market_fit.params,
                                       market_filter(x[:-100], market_fit.params).state)
    np.testing.assert_allclose(resumed.filtered, market_fit.filtered.filtered[-100:], atol=1e-12)


# ---------------------------------------------------------------------------
# Convergence and failures
# ---------------------------------------------------------------------------
def test_early_stopped_fit_is_not_converged(market_sim):
    x, _ = market_sim
    z = x / x.std(axis=0)
    # hmmlearn trap: hitting the iteration cap still reports converged.
    logging.getLogger("hmmlearn").setLevel(logging.ERROR)
    hmm = GaussianHMM(n_components=3, covariance_type="full", n_iter=2, random_state=0).fit(z)
    assert hmm.monitor_.converged
    assert not em_converged(hmm.monitor_, hmm.tol)
    fit = MarketRegimeModel(n_iter=2, n_seeds=1).fit(x)
    assert fit.status == "not_converged"
    assert all(c.status == "not_converged" for c in fit.candidates)
    assert np.all(np.isnan(fit.params.means)) and math.isnan(fit.loglik)
    assert fit.filtered is None and "not converged" in fit.message


def test_failures_are_results():
    rng = np.random.default_rng(0)
    short = MarketRegimeModel().fit(rng.normal(0, 0.01, (100, 3)))
    assert short.status == "too_little_data" and math.isnan(short.bic)
    x = rng.normal(0, 0.01, (400, 3))
    x[5, 1] = np.nan
    assert MarketRegimeModel().fit(x).status == "failed"
    x[5, 1] = 0.0
    x[:, 2] = 0.001
    const = MarketRegimeModel().fit(x)
    assert const.status == "failed" and "constant" in const.message


def test_params_json_roundtrip_diag_is_compact():
    p = random_params(np.random.default_rng(1), 2, 3, "diag")
    d = json.loads(json.dumps(p.to_dict()))
    assert np.shape(d["covars"]) == (2, 3)
    q = MarketRegimeParams.from_dict(d)
    np.testing.assert_array_equal(q.covariance_matrices, p.covariance_matrices)
    assert q.covariance_matrices.shape == (2, 3, 3)


def test_warm_refit_reaches_the_cold_optimum():
    # A scheduled refit starts from the previous optimum (plus the default start): on the
    # same data it must find the cold multi-start fit's number of states and likelihood.
    rng = np.random.default_rng(31)
    t_len = 3000
    s = np.zeros(t_len, int)
    for t in range(1, t_len):
        s[t] = s[t - 1] if rng.random() < 0.99 else 1 - s[t - 1]
    vol = np.where(s == 0, 0.006, 0.018)[:, None]
    x = vol * rng.standard_normal((t_len, 3)) + np.where(s == 0, 4e-4, -6e-4)[:, None]
    model = MarketRegimeModel(states=(2, 3), n_seeds=3, seed=5)
    cold = model.fit(x)
    assert cold.ok
    warm = model.fit(x, previous=cold.params, warm_start=True)
    assert warm.ok and warm.n_states == cold.n_states
    # the number of states is kept, not re-selected, and the fit says so
    assert len(warm.candidates) == 1
    assert any("kept" in w for w in warm.warnings)
    # hmmlearn's EM stops at tol = 1e-2 in log-likelihood; allow a few times that
    assert warm.loglik >= cold.loglik - 0.05
    np.testing.assert_allclose(warm.params.transition, cold.params.transition, atol=2e-3)


def test_runs_made_apart_and_in_any_order_give_the_same_fit(market_sim):
    """A refit hands each EM run to a worker (prepare / run_start / finish); made one at a
    time in reverse order, each by a fresh model, the fit is fit()'s to the last bit,
    random starts included (each start draws its cuts from its own seeded stream)."""
    x, _ = market_sim
    x = x[:1500, :4]
    model = MarketRegimeModel(states=(2, 3), n_seeds=3, seed=4)
    whole = model.fit(x)
    prepared = model.prepare(x)
    assert [(s.n_states, s.draw) for s in prepared.starts] == [
        (k, i) for k in (2, 3) for i in range(3)]
    runs = [MarketRegimeModel(states=(2, 3), n_seeds=3, seed=4).run_start(prepared, s)
            for s in reversed(prepared.starts)]
    apart = model.finish(prepared, runs)
    assert whole.ok and apart.ok
    assert apart.n_states == whole.n_states and apart.loglik == whole.loglik
    np.testing.assert_array_equal(apart.params.covars, whole.params.covars)
    np.testing.assert_array_equal(apart.params.transition, whole.params.transition)
    assert [(c.loglik, c.seed, c.n_iter) for c in apart.candidates] == \
        [(c.loglik, c.seed, c.n_iter) for c in whole.candidates]
    # the random starts differ from each other (a stream reused by mistake would not)
    assert len({model._random_cut(3, d)[1].tobytes() for d in (1, 2, 3)}) == 3
    with pytest.raises(ValueError, match="missing"):
        model.finish(prepared, runs[1:])


def test_prepare_lists_warm_runs_and_skips_candidates_with_too_little_data(market_sim):
    x, _ = market_sim
    model = MarketRegimeModel(states=(2, 3, 4))
    cold = model.fit(x[:600, :3])
    warm = model.prepare(x[:600, :3], previous=cold.params, warm_start=True)
    assert [(s.n_states, s.draw) for s in warm.starts] == [(cold.n_states, -1), (cold.n_states, 0)]
    # 8 factors, 260 rows: 2,080 data points; at 12 per parameter, 3 states (140
    # parameters) may be fitted, 4 states (191) may not: no EM run is made for them
    strict = MarketRegimeModel(states=(2, 3, 4), min_obs_per_param=12)
    tight = strict.prepare(x[:260])
    assert tight.too_small == (4,)
    assert {s.n_states for s in tight.starts} == {2, 3}
    fit = strict.finish(tight, [strict.run_start(tight, s) for s in tight.starts])
    assert [c.status for c in fit.candidates][-1] == "too_little_data"
    assert "2080 data points for 191 parameters" in fit.candidates[-1].message
