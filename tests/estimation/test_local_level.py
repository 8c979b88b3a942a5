"""Tests of the local-level premium filter, smoother and maximum likelihood.

References: statsmodels state space (UnobservedComponents with exact diffuse start, and a
small custom MLEModel with a (1, 1, T) observation variance for time-varying h); Durbin &
Koopman (2012), ch. 2, Nile estimates; seeded simulations with known truth.
"""

import json

import numpy as np
import pytest
import statsmodels.api as sm

from tracker.estimation.local_level import (
    FilterState,
    LocalLevelParams,
    advance_state,
    filter_local_level,
    fit_local_level,
    smooth_hindsight,
)
from tracker.estimation.volatility import ewma_variance

Z90 = 1.6448536269514722  # two-sided 90% normal quantile


class _TimeVaryingLocalLevel(sm.tsa.statespace.MLEModel):
    """Reference twin: statsmodels local level with obs_cov = c * h[t] as a (1, 1, T) array."""

    def __init__(self, endog, h, prior=None):
        super().__init__(endog, k_states=1)
        self.h = np.asarray(h, dtype=float)
        self["design", 0, 0] = 1.0
        self["transition", 0, 0] = 1.0
        self["selection", 0, 0] = 1.0
        self["obs_cov"] = np.zeros((1, 1, len(endog)))
        if prior is None:
            self.ssm.initialize_diffuse()
        else:
            self.ssm.initialize_known(np.array([prior[0]]), np.array([[prior[1]]]))

    @property
    def param_names(self):
        return ["q", "c"]

    def update(self, params, **kwargs):
        params = super().update(params, **kwargs)
        self["obs_cov"] = (params[1] * self.h).reshape(1, 1, -1)
        self["state_cov", 0, 0] = params[0]


def _factor_like(seed: int, n: int):
    """Daily-like returns with slowly varying volatility, a few missing rows, and EWMA h."""
    rng = np.random.default_rng(seed)
    vol = 0.01 * np.exp(0.4 * np.sin(np.arange(n) / 250.0))
    r = 3e-4 + vol * rng.standard_normal(n)
    r[[40, 41, 42, n // 2]] = np.nan
    h = ewma_variance(r).h
    return r, h


@pytest.fixture(scope="module")
def nile():
    return sm.datasets.nile.load_pandas().data["volume"].to_numpy(dtype=float)


@pytest.fixture(scope="module")
def factor():
    return _factor_like(seed=7, n=3000)


def _usable(y, h):
    """The reference model needs finite h; rows with unknown h become missing observations."""
    ok = np.isfinite(h)
    return np.where(ok, y, np.nan), np.where(ok, h, 1.0)


# ---------------------------------------------------------------- reference: statsmodels


def test_constant_variance_equals_unobserved_components(nile):
    # Reference: statsmodels UnobservedComponents('llevel', use_exact_diffuse=True).
    # Tolerance: 1e-8 relative on states, variances and loglik.
    p = LocalLevelParams(q=1469.1, c=15099.0)
    ref = sm.tsa.UnobservedComponents(nile, "llevel", use_exact_diffuse=True).smooth([p.c, p.q])
    mine = filter_local_level(p, nile, np.ones_like(nile))
    np.testing.assert_allclose(mine.mean, ref.filtered_state[0], rtol=1e-8)
    np.testing.assert_allclose(mine.var, ref.filtered_state_cov[0, 0], rtol=1e-8)
    np.testing.assert_allclose(mine.loglik_t, ref.llf_obs, rtol=1e-8)
    assert mine.loglik == pytest.approx(ref.llf, rel=1e-8)
    np.testing.assert_allclose(mine.std_error[1:], ref.standardized_forecasts_error[0, 1:],
                               rtol=1e-8)


@pytest.mark.parametrize("prior", [None, (0.0, 1e-6)])
def test_time_varying_variance_equals_statsmodels(factor, prior):
    # Reference: custom statsmodels MLEModel with a (1, 1, T) obs_cov (exact diffuse, or a
    # known start).  Our weak prior is on the row before the first, so its variance enters
    # statsmodels' P1 as var + q.  Tolerance: 1e-8 relative (means: 1e-8 of the return sd).
    y, h = _usable(*factor)
    p = LocalLevelParams(q=4e-9, c=1.3)
    state = None if prior is None else FilterState.weak_prior(*prior)
    sm_prior = None if prior is None else (prior[0], prior[1] + p.q)
    ref = _TimeVaryingLocalLevel(y, h, sm_prior).smooth([p.q, p.c])
    mine = filter_local_level(p, y, h, state=state, h_next=1e-4)
    ok = np.isfinite(mine.mean)
    scale = np.nanstd(y)
    np.testing.assert_allclose(mine.mean[ok], ref.filtered_state[0][ok], rtol=0, atol=1e-8 * scale)
    np.testing.assert_allclose(mine.var[ok], ref.filtered_state_cov[0, 0][ok], rtol=1e-8)
    assert mine.loglik == pytest.approx(ref.llf, rel=1e-8)
    used = np.isfinite(mine.loglik_t)
    np.testing.assert_allclose(mine.loglik_t[used], ref.llf_obs[used], rtol=1e-8)
    # one-step forecast of f[t+1] and its variance = statsmodels' forecast of the next row
    np.testing.assert_allclose(mine.forecast[ok][:-1], ref.forecasts[0, 1:][ok[:-1]],
                               rtol=0, atol=1e-8 * scale)
    np.testing.assert_allclose(mine.forecast_var[ok][:-1], ref.forecasts_error_cov[0, 0, 1:][ok[:-1]],
                               rtol=1e-8)
    se = np.isfinite(mine.std_error)
    np.testing.assert_allclose(mine.std_error[se], ref.standardized_forecasts_error[0][se], rtol=1e-8)
    n_missing = int(np.isnan(y).sum())
    assert mine.nobs == y.size - n_missing


def test_smoother_equals_statsmodels(factor):
    # Reference: statsmodels smoothed_state / smoothed_state_cov of the same custom model.
    y, h = _usable(*factor)
    p = LocalLevelParams(q=4e-9, c=1.3)
    ref = _TimeVaryingLocalLevel(y, h).smooth([p.q, p.c])
    sm_ = smooth_hindsight(p, y, h)
    np.testing.assert_allclose(sm_.mean, ref.smoothed_state[0], rtol=0, atol=1e-8 * np.nanstd(y))
    np.testing.assert_allclose(sm_.var, ref.smoothed_state_cov[0, 0], rtol=1e-8)


def test_weak_prior_fit_maximises_statsmodels_likelihood(factor):
    # Reference: the statsmodels log likelihood of the same model; our weak-prior estimate must
    # be a local maximum of it (every +-1% move of q or c lowers it).
    y, h = _usable(*factor)
    prior = (0.0, 1e-6)
    fit = fit_local_level(y, h, prior=FilterState.weak_prior(*prior))
    assert fit.status == "ok"
    q, c = fit.params.q, fit.params.c

    def llf(qq, cc):
        return _TimeVaryingLocalLevel(y, h, (prior[0], prior[1] + qq)).loglike([qq, cc])

    best = llf(q, c)
    assert best == pytest.approx(fit.loglik, rel=1e-8)
    for dq, dc in [(1.01, 1), (0.99, 1), (1, 1.01), (1, 0.99)]:
        assert llf(q * dq, c * dc) < best


# ---------------------------------------------------------------- reference: Durbin & Koopman


def test_nile_mle_matches_durbin_koopman(nile):
    # Durbin & Koopman (2012), ch. 2: exact diffuse MLE for the Nile data is
    # sigma2_eps = 15099, sigma2_eta = 1469.1.  Tolerance 1e-3 relative.
    fit = fit_local_level(nile, np.ones_like(nile))
    assert fit.status == "ok" and fit.converged
    assert fit.params.c == pytest.approx(15099.0, rel=1e-3)
    assert fit.params.q == pytest.approx(1469.1, rel=1e-3)
    # a warm start from elsewhere lands on the same optimum
    warm = fit_local_level(nile, np.ones_like(nile), start=LocalLevelParams(q=1000.0, c=12000.0))
    assert warm.params.q == pytest.approx(fit.params.q, rel=1e-5)
    assert warm.params.c == pytest.approx(fit.params.c, rel=1e-5)


def test_nile_mle_scales_with_h(nile):
    # With h = 2 everywhere, c must halve and q must not move (the model only sees c * h).
    fit = fit_local_level(nile, np.full_like(nile, 2.0))
    assert fit.params.c == pytest.approx(15099.0 / 2, rel=1e-3)
    assert fit.params.q == pytest.approx(1469.1, rel=1e-3)


# ---------------------------------------------------------------- known truth


def _simulate_premium(seed: int, n: int, q: float):
    """Random-walk premium plus GARCH(1,1) noise with persistence 0.99 (EWMA-like)."""
    rng = np.random.default_rng(seed)
    omega, alpha, beta = 1e-6, 0.06, 0.93
    mu = 4e-4 + np.cumsum(rng.standard_normal(n)) * np.sqrt(q)
    z = rng.standard_normal(n)
    r = np.empty(n)
    var = omega / (1 - alpha - beta)
    for t in range(n):
        e = np.sqrt(var) * z[t]
        r[t] = mu[t] + e
        var = omega + alpha * e * e + beta * var
    return r, mu


def test_filtered_band_covers_true_premium():
    # Seeded simulation, 40 paths x 3000 days, q = 1e-8 (premium sd drifts 0.01% a day),
    # full pipeline: EWMA h -> MLE (q, c) -> filter.  The 90% band must cover the true
    # premium on 80%-97% of the days after a 500-day burn-in (pooled over paths, since
    # filtering errors are persistent within a path).
    inside = []
    for k in range(40):
        r, mu = _simulate_premium(seed=100 + k, n=3000, q=1e-8)
        fit = fit_local_level(r, ewma_variance(r).h)
        assert fit.status == "ok"
        f = fit.filtered
        inside.append((np.abs(mu - f.mean) <= Z90 * np.sqrt(f.var))[500:])
    coverage = np.mean(np.concatenate(inside))
    assert 0.80 <= coverage <= 0.97


def test_mle_recovers_known_parameters():
    # Known truth with the true h: q = 1e-8, c = 1 (T = 15000, seeded).  Loose sampling bands.
    rng = np.random.default_rng(3)
    n, q = 15000, 1e-8
    h = 1e-4 * np.exp(0.5 * np.sin(np.arange(n) / 400.0))
    mu = np.cumsum(rng.standard_normal(n)) * np.sqrt(q)
    y = mu + np.sqrt(h) * rng.standard_normal(n)
    fit = fit_local_level(y, h)
    assert fit.params.c == pytest.approx(1.0, rel=0.05)
    assert 0.3 * q < fit.params.q < 3.0 * q


# ---------------------------------------------------------------- incremental path


@pytest.mark.parametrize("split", [1, 2, 41, 1500, 2999])
def test_two_chunks_equal_one_pass(factor, split):
    y, h = factor
    y = y.copy()
    y[:1] = np.nan  # the diffuse start has to survive a split inside the leading missing rows
    p = LocalLevelParams(q=4e-9, c=1.3)
    full = filter_local_level(p, y, h, h_next=1.1e-4)
    a = filter_local_level(p, y[:split], h[:split], h_next=h[split])
    b = filter_local_level(p, y[split:], h[split:], state=a.end_state, h_next=1.1e-4)
    for name in ("mean", "var", "forecast", "forecast_var", "std_error", "loglik_t", "snr"):
        joined = np.concatenate((getattr(a, name), getattr(b, name)))
        np.testing.assert_allclose(joined, getattr(full, name), rtol=1e-12, atol=0,
                                   err_msg=name)
    assert a.loglik + b.loglik == pytest.approx(full.loglik, rel=1e-12)
    assert a.nobs + b.nobs == full.nobs
    assert b.end_state.to_dict() == full.end_state.to_dict()


@pytest.mark.parametrize("case", ["whole", "resumed", "last_missing", "all_missing", "one_row"])
def test_advance_state_is_the_filters_end_state(factor, case):
    # advance_state (end state only, for the daily extras) against filter_local_level's
    # end_state and its last filtered premium
    y, h = factor
    y = y.copy()
    p = LocalLevelParams(q=4e-9, c=1.3)
    state = None
    if case == "last_missing":
        y[-3:] = np.nan
    elif case == "all_missing":
        y[:] = np.nan
    elif case in ("resumed", "one_row"):
        state = filter_local_level(p, y[:2000], h[:2000]).end_state
        y, h = (y[2000:2001], h[2000:2001]) if case == "one_row" else (y[2000:], h[2000:])
    flt = filter_local_level(p, y, h, state=state)
    end = advance_state(p, y, h, state=state)
    assert end.to_dict() == flt.end_state.to_dict()
    last = float("nan") if end.diffuse else end.mean
    np.testing.assert_equal(last, flt.mean[-1])


def test_state_round_trips_json_and_resumes(factor):
    y, h = factor
    p = LocalLevelParams(q=4e-9, c=1.3)
    a = filter_local_level(p, y[:1000], h[:1000])
    stored_state = json.dumps(a.end_state.to_dict(), allow_nan=False)
    stored_params = json.dumps(p.to_dict(), allow_nan=False)
    b = filter_local_level(LocalLevelParams.from_dict(json.loads(stored_params)), y[1000:],
                           h[1000:], state=FilterState.from_dict(json.loads(stored_state)))
    full = filter_local_level(p, y, h)
    np.testing.assert_allclose(b.mean, full.mean[1000:], rtol=1e-12)
    diffuse = FilterState.exact_diffuse()
    assert FilterState.from_dict(json.loads(json.dumps(diffuse.to_dict(), allow_nan=False))).diffuse


# ---------------------------------------------------------------- outputs and failures


def test_outputs_are_consistent(factor):
    y, h = factor
    p = LocalLevelParams(q=4e-9, c=1.3)
    f = filter_local_level(p, y, h, h_next=1.2e-4)
    np.testing.assert_allclose(f.snr, p.q / (p.c * h))
    assert f.forecast_var[-1] == pytest.approx(f.var[-1] + p.q + p.c * 1.2e-4, rel=1e-14)
    assert np.isnan(filter_local_level(p, y, h).forecast_var[-1])
    # before the first observation there is no estimate at all (diffuse)
    first = int(np.flatnonzero(np.isfinite(y) & np.isfinite(h))[0])
    assert np.all(np.isnan(f.mean[:first])) and f.mean[first] == y[first]


def test_zero_variance_forecast_is_a_missing_row(factor):
    # h = 0 (e.g. stale zero returns) would claim a noise-free return: the row is skipped.
    y, h = factor
    p = LocalLevelParams(q=0.0, c=1.3)
    h0 = h.copy()
    h0[100] = 0.0
    y_nan = y.copy()
    y_nan[100] = np.nan
    a = filter_local_level(p, y, h0)
    b = filter_local_level(p, y_nan, h)
    np.testing.assert_array_equal(a.mean, b.mean)
    assert a.nobs == b.nobs
    with pytest.raises(ValueError):
        LocalLevelParams(q=-1e-9, c=1.0)


def test_too_little_data_is_a_result():
    fit = fit_local_level(np.array([0.01, -0.02, 0.0]), np.ones(3) * 1e-4)
    assert fit.status == "too_little_data" and not fit.converged
    assert np.isnan(fit.params.q) and np.isnan(fit.loglik) and fit.filtered is None


def test_constant_returns_are_unidentified():
    fit = fit_local_level(np.full(200, 0.001), np.full(200, 1e-4))
    assert fit.status == "unidentified" and np.isnan(fit.params.c)


def test_constant_premium_is_reported_as_q_zero():
    # Levels with negative autocorrelation (MA(1), theta = -0.5) are something a random-walk
    # premium cannot produce, so the likelihood is flat down to q = 0.
    rng = np.random.default_rng(21)
    e = rng.standard_normal(4001)
    y = 5e-4 + 0.01 * (e[1:] - 0.5 * e[:-1])
    h = np.full(4000, 1e-4)
    fit = fit_local_level(y, h)
    assert fit.status == "ok"
    assert fit.params.q == 0.0 and "constant" in fit.message
    # at q = 0 under the diffuse start the filtered premium is the running sample mean
    np.testing.assert_allclose(fit.filtered.mean, np.cumsum(y) / np.arange(1, 4001), rtol=1e-9)
    weak = fit_local_level(y, h, prior=FilterState.weak_prior(0.0, 1.0))
    assert weak.status == "ok" and weak.params.q == 0.0


def test_compiled_pass_matches_the_interpreted_loop(factor):
    # the compiled prediction loop (used from jit.MIN_ROWS rows on) against the same
    # recursion run by the interpreter, with missing rows and zero-variance rows inside
    from tracker.estimation import jit, local_level

    y, h = factor
    y = y.copy()
    y[100:140] = np.nan
    R = 1.3 * h
    valid = np.isfinite(y) & np.isfinite(R) & (R > 0)
    assert y.size >= jit.MIN_ROWS
    fn = local_level._compiled_loop()
    assert fn is not None                                  # numba is a declared dependency
    out = [np.empty(y.size) for _ in range(4)]
    end_c = fn(4e-9, R, y, valid, 0.001, 1e-4, out[0], out[1])
    end_i = local_level._predict_loop(4e-9, R, y, valid, 0.001, 1e-4, out[2], out[3])
    np.testing.assert_array_equal(out[0], out[2])
    np.testing.assert_array_equal(out[1], out[3])
    assert end_c == pytest.approx(end_i, rel=1e-15)
