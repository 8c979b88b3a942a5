"""Tests of tracker.estimation.exposures.

Reference twins: statsmodels ``OLS(...).fit(cov_type='HAC')`` for the rolling
kernel, statsmodels ``RecursiveLS`` and a statsmodels ``MLEModel`` for the
random-walk Kalman filter.
"""

from __future__ import annotations

import json

import numpy as np
import statsmodels.api as sm
from scipy import stats
from statsmodels.stats.sandwich_covariance import S_hac_simple

from tracker.estimation.exposures import (
    CELL_STATUS,
    RandomWalkBetaModel,
    RandomWalkBetaParams,
    RandomWalkBetaState,
    RollingExposureModel,
    default_hac_lags,
    long_run_covariance,
)


def _panel(seed: int, n_rows: int, n_assets: int, n_factors: int, *, ar: float = 0.3):
    """Factor and asset returns with autocorrelated, heteroskedastic errors."""
    rng = np.random.default_rng(seed)
    f = rng.normal(0.0003, 0.01, (n_rows, n_factors))
    b = rng.normal(1.0, 0.5, (n_factors, n_assets))
    e = rng.normal(0.0, 0.01, (n_rows, n_assets)) * (1 + 40 * np.abs(f[:, :1]))
    for t in range(1, n_rows):
        e[t] += ar * e[t - 1]
    return f, f @ b + 0.0002 + e


def _statsmodels_window(y, f, a, t, lags, use_correction=False):
    """statsmodels HAC fit on rows a..t, with unusable rows set to zero in y and X.

    Zero rows add nothing to X'X, X'y or the HAC sums, and keep the lag
    positions of the other rows -- the same treatment as the fast kernel.
    """
    yy = y[a : t + 1].copy()
    xx = sm.add_constant(f[a : t + 1], has_constant="add")
    ok = np.isfinite(yy) & np.all(np.isfinite(xx), axis=1)
    yy[~ok] = 0.0
    xx[~ok] = 0.0
    res = sm.OLS(yy, xx).fit(cov_type="HAC", cov_kwds={"maxlags": lags, "use_correction": use_correction})
    return res, int(ok.sum())


def test_rolling_ols_matches_statsmodels_hac():
    # Reference: statsmodels OLS(cov_type='HAC', maxlags=L), Bartlett weights, no correction.
    f, y = _panel(0, 420, 5, 3)
    window, lags = 150, 5
    est = RollingExposureModel(window, hac_lags=lags).fit(y, f)
    assert est.status == "ok"
    for t in [149, 150, 233, 301, 419]:
        a = t - window + 1
        for i in range(y.shape[1]):
            res, _ = _statsmodels_window(y[:, i], f, a, t, lags)
            np.testing.assert_allclose(est.betas[t, i], res.params[1:], rtol=0, atol=1e-10)
            np.testing.assert_allclose(est.alpha[t, i], res.params[0], rtol=0, atol=1e-10)
            np.testing.assert_allclose(est.se[t, i], res.bse[1:], rtol=1e-8)
            np.testing.assert_allclose(est.alpha_se[t, i], res.bse[0], rtol=1e-8)
            np.testing.assert_allclose(est.r2[t, i], res.rsquared, rtol=0, atol=1e-10)
            np.testing.assert_allclose(est.resid_var[t, i], res.scale, rtol=1e-9)
            assert est.nobs[t, i] == window
            if t == 419:
                np.testing.assert_allclose(est.beta_cov_last[i], res.cov_params()[1:, 1:], rtol=1e-8,
                                           atol=1e-14)
    # Before a full window there is no estimate (default min_nobs = window).
    assert np.all(np.isnan(est.betas[:149]))
    assert est.status_of(10, 0) == "too_little_data"


def test_rolling_ols_with_missing_values_matches_statsmodels():
    # Reference: statsmodels HAC on the window with unusable rows zeroed (see helper).
    f, y = _panel(1, 300, 4, 2)
    y[40:52, 1] = np.nan
    y[200, 2] = np.nan
    f[120, 0] = np.nan
    window, lags = 100, 3
    est = RollingExposureModel(window, min_nobs=80, hac_lags=lags, keep_all_covariances=True).fit(y, f)
    for t in [90, 99, 130, 205, 299]:
        a = max(0, t - window + 1)
        for i in range(y.shape[1]):
            res, n_ok = _statsmodels_window(y[:, i], f, a, t, lags)
            assert est.nobs[t, i] == n_ok
            if n_ok < 80:
                assert np.isnan(est.betas[t, i]).all()
                continue
            np.testing.assert_allclose(est.betas[t, i], res.params[1:], rtol=0, atol=1e-10)
            np.testing.assert_allclose(est.se[t, i], res.bse[1:], rtol=1e-8)
            np.testing.assert_allclose(est.beta_cov[t, i], res.cov_params()[1:, 1:], rtol=1e-8, atol=1e-14)


def test_near_exact_fits_keep_their_precision():
    # R^2 of 0.99999 and an exact fit: the expanded middle matrix would lose digits, so these
    # cells take the residual path. Reference: statsmodels HAC, se to 1e-8 relative.
    rng = np.random.default_rng(14)
    f = rng.normal(0.0005, 0.01, (400, 3))
    y = 0.001 + f @ rng.normal(1.0, 0.5, (3, 2))
    y[:, 0] += rng.normal(0.0, 1e-5, 400)
    est = RollingExposureModel(300, hac_lags=5).fit(y, f)
    res, _ = _statsmodels_window(y[:, 0], f, 100, 399, 5)
    np.testing.assert_allclose(est.se[399, 0], res.bse[1:], rtol=1e-8)
    exact, _ = _statsmodels_window(y[:, 1], f, 100, 399, 5)
    np.testing.assert_allclose(est.se[399, 1], exact.bse[1:], rtol=0, atol=1e-12)


def test_small_sample_correction_matches_statsmodels():
    # Reference: statsmodels HAC with use_correction=True (factor n / (n - k)).
    f, y = _panel(2, 200, 3, 4)
    est = RollingExposureModel(120, hac_lags=2, small_sample_correction=True).fit(y, f)
    for i in range(3):
        res, _ = _statsmodels_window(y[:, i], f, 80, 199, 2, use_correction=True)
        np.testing.assert_allclose(est.se[199, i], res.bse[1:], rtol=1e-8)


def test_long_run_covariance_and_default_lags_match_statsmodels():
    # Reference: statsmodels S_hac_simple with nlags=None uses floor(4 (T/100)^(2/9)).
    rng = np.random.default_rng(3)
    u = rng.normal(size=(756, 3))
    np.testing.assert_allclose(long_run_covariance(u, default_hac_lags(756)), S_hac_simple(u), rtol=1e-12)
    assert default_hac_lags(756) == 6  # 4 * 7.56 ** (2 / 9) = 6.27 (common practice rule)


def test_real_time_and_incremental_update():
    f, y = _panel(4, 360, 6, 3)
    model = RollingExposureModel(120, hac_lags=4)
    full = model.fit(y, f)
    # Incremental: only the new rows, with the preceding window - 1 rows as context.
    tail = model.fit(y[200:], f[200:], output_from=119)
    np.testing.assert_allclose(tail.betas, full.betas[319:], rtol=0, atol=1e-12)
    np.testing.assert_allclose(tail.se, full.se[319:], rtol=1e-10)
    # Real time: changing rows after t leaves the estimate at t unchanged.
    y2 = y.copy()
    y2[251:] += 0.05
    changed = model.fit(y2, f)
    np.testing.assert_array_equal(changed.betas[:251], full.betas[:251])
    assert not np.allclose(changed.betas[260], full.betas[260])


def test_collinear_window_is_unidentified():
    f, y = _panel(5, 200, 2, 2)
    f[:, 1] = 2.0 * f[:, 0]
    est = RollingExposureModel(60, hac_lags=1).fit(y, f)
    assert est.status == "unidentified"
    assert CELL_STATUS[est.cell_status[100, 0]] == "unidentified"
    assert np.isnan(est.betas[100]).all()
    assert est.message


def test_settings_round_trip_json():
    model = RollingExposureModel(60, min_nobs=36, hac_lags=3, small_sample_correction=True)
    back = RollingExposureModel.from_dict(json.loads(json.dumps(model.to_dict())))
    assert back.to_dict() == model.to_dict()


def test_interval_coverage_with_known_exposures():
    # Seeded simulation, true betas known: nominal 90% intervals (z = 1.645).
    rng = np.random.default_rng(6)
    n_rows, n_assets, k = 500, 200, 3
    f = rng.normal(0.0, 0.01, (n_rows, k))
    true_b = rng.normal(1.0, 0.6, (n_assets, k))
    y = f @ true_b.T + rng.normal(0.0, 0.01, (n_rows, n_assets))
    est = RollingExposureModel(500, hac_lags=4).fit(y, f, output_from=499)
    z = stats.norm.ppf(0.95)
    covered = np.abs(est.betas[0] - true_b) <= z * est.se[0]
    assert covered.mean() >= 0.85


# --------------------------------------------------------------------------- #
# Random-walk betas
# --------------------------------------------------------------------------- #
def _params(obs_var, state_var, n_assets, k, intercept_varies=False):
    return RandomWalkBetaParams(
        obs_var=np.full(n_assets, obs_var), state_var=np.full(n_assets, state_var),
        intercept_varies=intercept_varies, assets=tuple(f"a{i}" for i in range(n_assets)),
        factors=tuple(f"f{j}" for j in range(k)),
    )


def test_random_walk_filter_at_zero_state_variance_is_recursive_least_squares():
    # Reference: statsmodels RecursiveLS (exact diffuse start): filtered coefficients are
    # OLS on rows 0..t and filtered_cov = scale (X_t'X_t)^{-1}.
    f, y = _panel(7, 250, 3, 2, ar=0.0)
    init = 30
    est = RandomWalkBetaModel(init_obs=init).fix(y, f, _params(1e-4, 0.0, 3, 2))
    for i in range(3):
        res = sm.RecursiveLS(y[:, i], sm.add_constant(f)).fit()
        ref = res.recursive_coefficients.filtered.T
        ours = np.column_stack([est.alpha[:, i], est.betas[:, i]])
        np.testing.assert_allclose(ours[init - 1 :], ref[init - 1 :], rtol=0, atol=1e-10)
        ref_var = np.diagonal(res.recursive_coefficients.filtered_cov, axis1=0, axis2=1) / res.scale
        np.testing.assert_allclose(est.se[init - 1 :, i] ** 2 / 1e-4, ref_var[init - 1 :, 1:], rtol=1e-8)
        assert np.isnan(est.betas[: init - 1, i]).all()


class _RandomWalkRegression(sm.tsa.statespace.MLEModel):
    """statsmodels state-space twin of one asset's random-walk regression."""

    def __init__(self, endog, design, obs_var, state_cov, a1, p1):
        k = design.shape[1]
        super().__init__(endog, k_states=k, initialization="known", initial_state=a1,
                         initial_state_cov=p1)
        self["design"] = design.T[None, :, :]
        self["obs_cov"] = np.array([[obs_var]])
        self["transition"] = np.eye(k)
        self["selection"] = np.eye(k)
        self["state_cov"] = state_cov


def test_random_walk_filter_matches_statsmodels_state_space():
    # Reference: statsmodels Kalman filter (MLEModel with time-varying design) at fixed params.
    f, y = _panel(8, 300, 2, 2, ar=0.0)
    init, s2, q = 25, 1.2e-4, 3e-4
    model = RandomWalkBetaModel(init_obs=init, intercept_varies=True)
    est = model.fix(y, f, _params(s2, q, 2, 2, intercept_varies=True))
    x = sm.add_constant(f)
    for i in range(2):
        xi, yi = x[:init], y[:init, i]
        inv = np.linalg.inv(xi.T @ xi)
        a0 = inv @ xi.T @ yi
        # statsmodels' initial state is the prediction for the first filtered row.
        mod = _RandomWalkRegression(y[init:, i], x[init:], s2, q * np.eye(3), a0, s2 * inv + q * np.eye(3))
        kf = mod.ssm.filter()
        ref = kf.filtered_state.T
        ours = np.column_stack([est.alpha[init:, i], est.betas[init:, i]])
        np.testing.assert_allclose(ours, ref, rtol=0, atol=1e-10)
        ref_sd = np.sqrt(np.diagonal(kf.filtered_state_cov, axis1=0, axis2=1))
        np.testing.assert_allclose(est.se[init:, i], ref_sd[:, 1:], rtol=1e-8)
        np.testing.assert_allclose(est.loglike[i], kf.llf_obs.sum(), rtol=1e-10)


def test_random_walk_fix_resumes_from_json_state():
    f, y = _panel(9, 400, 3, 2, ar=0.0)
    model = RandomWalkBetaModel(init_obs=30)
    params = _params(1e-4, 2e-5, 3, 2)
    whole = model.fix(y, f, params)
    first = model.fix(y[:250], f[:250], params)
    state = RandomWalkBetaState.from_dict(json.loads(json.dumps(first.state.to_dict())))
    params_back = RandomWalkBetaParams.from_dict(json.loads(json.dumps(params.to_dict())))
    rest = model.fix(y[250:], f[250:], params_back, state)
    np.testing.assert_allclose(rest.betas, whole.betas[250:], rtol=0, atol=1e-12)
    np.testing.assert_allclose(rest.se, whole.se[250:], rtol=1e-10)
    np.testing.assert_allclose(first.loglike + rest.loglike, whole.loglike, rtol=1e-10)
    assert rest.state.nobs.tolist() == whole.state.nobs.tolist()


def test_random_walk_fix_starts_assets_without_a_saved_state():
    # An asset with no history at the last fit (a new listing) starts from OLS on its
    # first init_obs new rows, exactly as a fresh filter would.
    f, y = _panel(15, 200, 2, 2, ar=0.0)
    model = RandomWalkBetaModel(init_obs=30)
    params = _params(1e-4, 1e-5, 2, 2)
    first = model.fix(y[:100], f[:100], params)
    state = first.state.to_dict()
    state["coef"][1] = [None, None, None]
    state["coef_cov"][1] = [[None] * 3] * 3
    rest = model.fix(y[100:], f[100:], params, RandomWalkBetaState.from_dict(state))
    fresh = model.fix(y[100:], f[100:], params)
    np.testing.assert_allclose(rest.betas[:, 1], fresh.betas[:, 1], rtol=0, atol=1e-12)
    assert rest.asset_status == ("ok", "ok")


def _simulate_random_walk_betas(seed, n_rows, n_assets, k, s2, q):
    rng = np.random.default_rng(seed)
    f = rng.normal(0.0, 0.01, (n_rows, k))
    b0 = rng.normal(1.0, 0.4, (n_assets, k))
    path = b0 + np.cumsum(rng.normal(0.0, np.sqrt(q), (n_rows, n_assets, k)), axis=0)
    y = np.einsum("tk,tnk->tn", f, path) + rng.normal(0.0, np.sqrt(s2), (n_rows, n_assets))
    return f, y, path


def test_random_walk_mle_finds_the_signal_to_noise_ratio():
    # Seeded simulation with known q / s2 = 0.5: the median fitted log10 ratio is close.
    s2, q = 1e-4, 5e-5
    f, y, _ = _simulate_random_walk_betas(10, 1500, 12, 2, s2, q)
    est = RandomWalkBetaModel().fit(y, f)
    assert est.status == "ok"
    # Single assets can pile up at zero drift (a known small-sample feature of this MLE),
    # so the check is on the median across assets.
    ratio = np.maximum(est.params.state_var / est.params.obs_var, 1e-12)
    assert abs(np.median(np.log10(ratio)) - np.log10(q / s2)) < 0.3
    np.testing.assert_allclose(np.median(est.params.obs_var), s2, rtol=0.15)
    # Constant betas: the likelihood prefers (near) zero drift.
    rng = np.random.default_rng(11)
    fc = rng.normal(0.0, 0.01, (800, 2))
    yc = fc @ rng.normal(1.0, 0.4, (2, 6)) + rng.normal(0.0, 0.01, (800, 6))
    const = RandomWalkBetaModel().fit(yc, fc)
    assert np.median(const.params.state_var / const.params.obs_var) < 1e-2


def test_random_walk_interval_coverage_at_true_parameters():
    # Seeded simulation: 90% filtered intervals of the true (drifting) betas.
    s2, q = 1e-4, 2e-5
    f, y, path = _simulate_random_walk_betas(12, 800, 20, 2, s2, q)
    est = RandomWalkBetaModel(init_obs=40).fix(y, f, _params(s2, q, 20, 2))
    z = stats.norm.ppf(0.95)
    covered = np.abs(est.betas[100:] - path[100:]) <= z * est.se[100:]
    assert covered.mean() >= 0.85


def test_random_walk_too_little_data():
    f, y = _panel(13, 20, 2, 2, ar=0.0)
    est = RandomWalkBetaModel(init_obs=30).fit(y, f)
    assert est.status == "too_little_data"
    assert est.asset_status == ("too_little_data", "too_little_data")
    assert np.isnan(est.betas).all()


def test_a_few_new_rows_from_their_windows_directly_match_statsmodels_and_the_sliding_sums():
    # Up to p output rows are computed from each window's own residuals, not from the
    # sliding sums (a day's update would pay the sums' whole warm-up). Reference:
    # statsmodels OLS(cov_type='HAC') on each window; twin: the sliding-sum kernel on the
    # same rows (it loses a few digits in its expansion, hence 1e-9 there).
    f, y = _panel(21, 400, 7, 3)
    y[390, 2] = np.nan                                    # one asset with a gap in the window
    window, lags = 150, 5
    model = RollingExposureModel(window, hac_lags=lags, min_nobs=140)
    p = f.shape[1] + 1
    direct = model.fit(y, f, output_from=400 - p)         # p rows: the direct path
    sliding = model.fit(y, f, output_from=400 - p - 1)    # p + 1 rows: the sliding sums
    for o, t in enumerate(range(400 - p, 400)):
        for i in range(y.shape[1]):
            res, n = _statsmodels_window(y[:, i], f, t - window + 1, t, lags)
            assert direct.nobs[o, i] == n
            np.testing.assert_allclose(direct.betas[o, i], res.params[1:], rtol=0, atol=1e-10)
            np.testing.assert_allclose(direct.se[o, i], res.bse[1:], rtol=1e-8)
    np.testing.assert_allclose(direct.betas, sliding.betas[1:], rtol=0, atol=1e-12)
    np.testing.assert_allclose(direct.se, sliding.se[1:], rtol=1e-9)
    np.testing.assert_allclose(direct.r2, sliding.r2[1:], rtol=0, atol=1e-10)
    np.testing.assert_allclose(direct.beta_cov_last, sliding.beta_cov_last, rtol=1e-8, atol=1e-14)
    np.testing.assert_array_equal(direct.cell_status, sliding.cell_status[1:])
