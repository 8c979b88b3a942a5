"""The compiled Gaussian-HMM EM (tracker.estimation.gaussian_hmm) against hmmlearn.

Reference library: hmmlearn 0.3's ``GaussianHMM`` with ``init_params=''`` and
``params='stmc'`` (its default priors). Its public ``score_samples`` gives the
posteriors and log-likelihood, and its ``fit`` the EM path from a given start. The data
are drawn by hmmlearn's own ``sample`` from invented parameters.
"""
import logging

import numpy as np
import pytest
from hmmlearn.hmm import GaussianHMM

from tracker.estimation import gaussian_hmm as g
from tracker.estimation.market_regime import MarketRegimeModel

# tolerances: one E or M step 1e-9 relative (summation order differs from hmmlearn's
# log-space passes); a converged EM path 1e-8 on the log-likelihood, 1e-5 on parameters
STEP_RTOL = 1e-9
PATH_RTOL = 1e-8
PARAM_RTOL = 1e-5


def _truth(rng, k, n, covariance_type):
    means = rng.normal(0, 0.6, (k, n))
    if covariance_type == "full":
        a = rng.normal(0, 1, (k, n, n))
        covars = a @ np.transpose(a, (0, 2, 1)) / n + 0.3 * np.eye(n)
    else:
        covars = rng.uniform(0.4, 2.5, (k, n))
    trans = 0.9 * np.eye(k) + 0.1 * rng.dirichlet(np.ones(k), size=k)
    return g.HmmParams(rng.dirichlet(np.ones(k)), trans, means, covars, covariance_type)


def _hmm(p: g.HmmParams, **kw) -> GaussianHMM:
    hmm = GaussianHMM(n_components=p.n_states, covariance_type=p.covariance_type,
                      init_params="", params="stmc", **kw)
    hmm.startprob_, hmm.transmat_ = p.startprob.copy(), p.transmat.copy()
    hmm.means_, hmm.covars_ = p.means.copy(), p.covars.copy()
    return hmm


def _sample(p, t_len, seed):
    return _hmm(p).sample(t_len, random_state=seed)[0]


def _perturbed(p: g.HmmParams, rng) -> g.HmmParams:
    """A start near, not at, the truth."""
    covars = p.covars * (1.0 + 0.2 * rng.random(p.covars.shape[:1] + (1,) * (p.covars.ndim - 1)))
    return g.HmmParams(np.full(p.n_states, 1.0 / p.n_states),
                       0.5 * p.transmat + 0.5 / p.n_states, p.means + rng.normal(0, 0.3, p.means.shape),
                       covars, p.covariance_type)


@pytest.mark.parametrize("covariance_type", ["full", "diag"])
def test_forward_backward_equals_hmmlearn_score_samples(covariance_type):
    rng = np.random.default_rng(5)
    p = _truth(rng, 3, 4, covariance_type)
    z = _sample(p, 900, 1)
    ref_ll, ref_post = _hmm(p).score_samples(z)
    dens = g.log_densities(z, p.means, p.covars, covariance_type)
    post, xi, ll = g.kernel()(dens, p.startprob, p.transmat)
    np.testing.assert_allclose(ll, ref_ll, rtol=STEP_RTOL)
    np.testing.assert_allclose(post, ref_post, rtol=1e-7, atol=1e-12)
    # pairwise posteriors: T - 1 transitions, rows of xi add up to the posteriors of t < T
    np.testing.assert_allclose(xi.sum(), z.shape[0] - 1, rtol=1e-12)
    np.testing.assert_allclose(xi.sum(axis=1), post[:-1].sum(axis=0), rtol=1e-10)


def test_compiled_pass_equals_the_interpreted_twin():
    rng = np.random.default_rng(8)
    p = _truth(rng, 4, 3, "full")
    z = _sample(p, 120, 2)
    dens = g.log_densities(z, p.means, p.covars, "full")
    got = g.kernel()(dens, p.startprob, p.transmat)
    ref = g._forward_backward(dens, p.startprob, p.transmat)
    for a, b in zip(got, ref):
        np.testing.assert_allclose(a, b, rtol=1e-12, atol=1e-300)


@pytest.mark.parametrize("covariance_type", ["full", "diag"])
def test_log_densities_equal_hmmlearn(covariance_type):
    # hmmlearn.stats.log_multivariate_normal_density, hmmlearn's emission densities
    from hmmlearn.stats import log_multivariate_normal_density

    rng = np.random.default_rng(3)
    p = _truth(rng, 4, 5, covariance_type)
    z = _sample(p, 300, 7)
    np.testing.assert_allclose(g.log_densities(z, p.means, p.covars, covariance_type),
                               log_multivariate_normal_density(z, p.means, p.covars, covariance_type),
                               rtol=1e-11)


def test_not_positive_definite_covariance_is_retried_as_hmmlearn_does():
    # hmmlearn (stats.log_multivariate_normal_density, 'full') adds 1e-7 to the diagonal
    # when the Cholesky factorisation fails; a covariance with a -1e-9 eigenvalue passes then
    from hmmlearn.stats import log_multivariate_normal_density

    rng = np.random.default_rng(4)
    p = _truth(rng, 2, 3, "full")
    v = np.linalg.qr(rng.normal(size=(3, 3)))[0]
    covars = np.stack([p.covars[0], v @ np.diag([1.0, 0.5, -1e-9]) @ v.T])
    z = _sample(p, 200, 3)
    with pytest.raises(np.linalg.LinAlgError):
        np.linalg.cholesky(covars[1])
    np.testing.assert_allclose(g.log_densities(z, p.means, covars, "full"),
                               log_multivariate_normal_density(z, p.means, covars, "full"), rtol=1e-9)


@pytest.mark.parametrize("covariance_type", ["full", "diag"])
def test_one_em_step_equals_hmmlearn(covariance_type):
    rng = np.random.default_rng(6)
    p = _truth(rng, 3, 4, covariance_type)
    z = _sample(p, 1200, 4)
    start = _perturbed(p, rng)
    ref = _hmm(start, n_iter=1, covars_prior=1e-2).fit(z)
    got = g.fit_compiled(z, start, n_iter=1, tol=1e-2, covars_prior=1e-2)
    assert got.n_iter == ref.monitor_.iter == 1
    np.testing.assert_allclose(got.history[-1], ref.monitor_.history[-1], rtol=STEP_RTOL)
    np.testing.assert_allclose(got.params.startprob, ref.startprob_, rtol=1e-8, atol=1e-14)
    np.testing.assert_allclose(got.params.transmat, ref.transmat_, rtol=STEP_RTOL)
    np.testing.assert_allclose(got.params.means, ref.means_, rtol=STEP_RTOL, atol=1e-12)
    np.testing.assert_allclose(got.params.full_covars, ref.covars_, rtol=STEP_RTOL, atol=1e-12)


@pytest.mark.parametrize("covariance_type", ["full", "diag"])
def test_converged_em_path_equals_hmmlearn(covariance_type):
    rng = np.random.default_rng(9)
    p = _truth(rng, 3, 5, covariance_type)
    z = _sample(p, 2500, 5)
    start = _perturbed(p, rng)
    logging.getLogger("hmmlearn").setLevel(logging.ERROR)
    ref = _hmm(start, n_iter=500, tol=1e-4, covars_prior=1e-2).fit(z)
    got = g.fit_compiled(z, start, n_iter=500, tol=1e-4, covars_prior=1e-2)
    assert got.n_iter == ref.monitor_.iter > 3           # the same number of EM iterations
    # hmmlearn's monitor keeps either the last two values or the whole path, by version
    tail = list(ref.monitor_.history)[-2:]
    np.testing.assert_allclose(got.history[-2:], tail, rtol=PATH_RTOL)
    np.testing.assert_allclose(got.params.means, ref.means_, rtol=PARAM_RTOL, atol=1e-7)
    np.testing.assert_allclose(got.params.full_covars, ref.covars_, rtol=PARAM_RTOL, atol=1e-7)
    np.testing.assert_allclose(got.params.transmat, ref.transmat_, rtol=PARAM_RTOL, atol=1e-7)
    via = g.fit_hmmlearn(z, start, n_iter=500, tol=1e-4, covars_prior=1e-2, min_covar=1e-3)
    assert via.engine == "hmmlearn" and via.n_iter == ref.monitor_.iter


def test_market_model_chooses_and_fits_the_same_with_either_engine():
    # the whole market fit (three candidate numbers of states, three starts each, BIC)
    # run by hmmlearn and by the compiled pass: same choice, same log-likelihoods
    rng = np.random.default_rng(12)
    truth = _truth(rng, 3, 4, "full")
    x = 0.01 * _sample(truth, 1500, 6)
    fits = {e: MarketRegimeModel(engine=e).fit(x) for e in ("compiled", "hmmlearn")}
    a, b = fits["compiled"], fits["hmmlearn"]
    assert a.ok and b.ok and a.n_states == b.n_states
    for ca, cb in zip(a.candidates, b.candidates):
        assert (ca.status, ca.seed, ca.n_iter) == (cb.status, cb.seed, cb.n_iter)
        if ca.status == "ok":
            np.testing.assert_allclose(ca.loglik, cb.loglik, rtol=PATH_RTOL)
    np.testing.assert_allclose(a.params.covars, b.params.covars, rtol=PARAM_RTOL, atol=1e-12)
    np.testing.assert_allclose(a.filtered.filtered, b.filtered.filtered, atol=1e-6)


def test_engine_is_checked():
    with pytest.raises(ValueError, match="engine"):
        g.fit(np.zeros((10, 2)), None, n_iter=1, tol=1.0, covars_prior=0.0, min_covar=0.0, engine="gpu")
