"""Tests of tracker.estimation.pricing.

External references: linearmodels (``LinearFactorModel``, ``TradedFactorModel``
and its shipped monthly US factor data), statsmodels OLS, scipy distributions,
and published identities (GRS 1989, Hansen & Jagannathan 1991, Shanken 1992,
Lo 2002). Seeded simulations have known truth.
"""

from __future__ import annotations

import re

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from hypothesis import given, settings
from hypothesis import strategies as st
from linearmodels.asset_pricing import LinearFactorModel, TradedFactorModel
from linearmodels.datasets import french
from scipy import stats

from tracker.estimation.pricing import (
    CompleteMarketInversion,
    ExpectedReturnModel,
    FamaMacBeth,
    GRSTest,
    LinearSDF,
    implied_excess_returns,
)


@pytest.fixture(scope="module")
def french_data():
    """linearmodels' monthly US data 1949-2017: 9 size/value portfolios less RF, 3 factors."""
    data = french.load()
    names = [c for c in data.columns if re.fullmatch(r"S\dV\d", c)]
    # The shipped columns are S1V1, S1V3, S1V5, S3V1, ..., S5V5 (not S1V1..S3V3).
    assert names == ["S1V1", "S1V3", "S1V5", "S3V1", "S3V3", "S3V5", "S5V1", "S5V3", "S5V5"]
    portfolios = data[names].sub(data["RF"], axis=0)
    factors = data[["MktRF", "SMB", "HML"]]
    return portfolios, factors


def _factor_panel(seed, n_rows, n_assets, k, *, mean=0.005, sd=0.04, noise=0.03, alpha=0.0):
    rng = np.random.default_rng(seed)
    f = rng.normal(mean, sd, (n_rows, k))
    b = rng.normal(1.0, 0.5, (n_assets, k))
    y = alpha + f @ b.T + rng.normal(0.0, noise, (n_rows, n_assets))
    return f, y, b


# --------------------------------------------------------------------------- #
# Real data: linearmodels as the reference implementation
# --------------------------------------------------------------------------- #
def test_two_pass_premia_match_linearmodels_on_french_data(french_data):
    portfolios, factors = french_data
    ours = FamaMacBeth().fit(portfolios, factors)
    ref = LinearFactorModel(portfolios, factors).fit()
    assert ours.status == "ok"
    # Reference: linearmodels LinearFactorModel risk premia, 1e-6 relative.
    np.testing.assert_allclose(ours.premia, ref.risk_premia.to_numpy(), rtol=1e-6)
    # Values quoted in the issue, printed to 5 significant digits: within half a unit of the
    # last printed digit (5e-8); 1e-6 relative is finer than the quote itself.
    np.testing.assert_allclose(ours.premia, [0.0063626, 0.0002021, 0.0041899], rtol=0, atol=5e-8)


def test_sdf_and_max_sharpe_on_french_data(french_data):
    _, factors = french_data
    est = LinearSDF(ddof=1).fit(factors)
    f = factors.to_numpy()
    mu, sigma = f.mean(0), np.cov(f, rowvar=False, ddof=1)
    # Independent computation with numpy (same formula, different code path).
    np.testing.assert_allclose(est.b, np.linalg.solve(sigma, mu), rtol=1e-10)
    # Issue values [4.17946, 1.40791, 6.41986] and .226984, quoted to 6 significant digits:
    # within half a unit of the last printed digit. (The second element, 1.4079118, differs
    # from its 6-digit quote by 1.3e-6 relative, so 1e-6 relative cannot hold for the quote.)
    np.testing.assert_allclose(est.b, [4.17946, 1.40791, 6.41986], rtol=0, atol=5e-6)
    np.testing.assert_allclose(est.max_sharpe, 0.226984, rtol=0, atol=5e-7)
    np.testing.assert_allclose(est.hj_ratio, est.max_sharpe, rtol=1e-12)
    np.testing.assert_allclose(est.max_sharpe_annual, est.max_sharpe * np.sqrt(12), rtol=1e-12)


def test_joint_alpha_tests_match_linearmodels_on_french_data(french_data):
    portfolios, factors = french_data
    ours = GRSTest(hac_lags=0).fit(portfolios, factors)
    ref = TradedFactorModel(portfolios, factors).fit()  # robust covariance, debiased
    # Reference: linearmodels TradedFactorModel alphas (same OLS) and J statistic (White Wald).
    np.testing.assert_allclose(ours.alphas, ref.alphas.to_numpy(), rtol=0, atol=1e-12)
    np.testing.assert_allclose(ours.wald_stat, ref.j_statistic.stat, rtol=1e-10)
    # Reference: linearmodels kernel (Bartlett) covariance with bandwidth 3 = Newey-West 3 lags.
    ref_hac = TradedFactorModel(portfolios, factors).fit(cov_type="kernel", kernel="bartlett", bandwidth=3)
    ours_hac = GRSTest(hac_lags=3).fit(portfolios, factors)
    np.testing.assert_allclose(ours_hac.wald_stat, ref_hac.j_statistic.stat, rtol=1e-10)
    assert ours.grs_df == (9, len(portfolios) - 9 - 3)


# --------------------------------------------------------------------------- #
# GRS
# --------------------------------------------------------------------------- #
def test_grs_statistic_equals_rescaled_classical_wald():
    # Independent route: statsmodels OLS per asset. The classical covariance of the alphas is
    # [(X'X)^{-1}]_00 * Sigma (MLE); W0 = a' [c00 Sigma]^{-1} a and F = (T-N-K)/(N T) W0
    # (GRS 1989; the F is the Wald statistic rescaled to its exact law under normality).
    f, y, _ = _factor_panel(20, 90, 6, 2, alpha=0.002)
    ours = GRSTest().fit(y, f)
    x = sm.add_constant(f)
    fits = [sm.OLS(y[:, i], x).fit() for i in range(6)]
    alphas = np.array([r.params[0] for r in fits])
    resid = np.column_stack([r.resid for r in fits])
    c00 = fits[0].normalized_cov_params[0, 0]
    w0 = alphas @ np.linalg.solve(c00 * resid.T @ resid / 90, alphas)
    t, n, k = 90, 6, 2
    np.testing.assert_allclose(ours.grs_f, (t - n - k) / (n * t) * w0, rtol=1e-10)
    np.testing.assert_allclose(ours.grs_pvalue, stats.f.sf(ours.grs_f, n, t - n - k), rtol=1e-12)
    # GRS (1989): a' Sigma^{-1} a = SR_max(assets and factors)^2 - SR_max(factors)^2 (MLE moments).
    quad = alphas @ np.linalg.solve(resid.T @ resid / t, alphas)
    np.testing.assert_allclose(ours.max_sharpe_all**2 - ours.max_sharpe_factors**2, quad, rtol=1e-9)


def test_grs_size_is_exact_where_the_asymptotic_wald_over_rejects():
    # Seeded simulation under the null (zero alphas, iid normal errors), T = 60, N = 10, K = 3.
    rng = np.random.default_rng(21)
    n_sim, t, n, k = 1500, 60, 10, 3
    p_grs = np.empty(n_sim)
    p_wald = np.empty(n_sim)
    for s in range(n_sim):
        f = rng.normal(0.005, 0.04, (t, k))
        y = f @ rng.normal(1.0, 0.3, (k, n)) + rng.normal(0.0, 0.02, (t, n))
        res = GRSTest().fit(y, f)
        p_grs[s], p_wald[s] = res.grs_pvalue, res.wald_pvalue
    # Binomial sd of a 5% rate over 1500 draws is 0.56%; the band is about 3.5 sd.
    assert 0.03 <= np.mean(p_grs < 0.05) <= 0.07
    assert np.mean(p_wald < 0.05) > 0.10


def test_grs_too_little_data():
    f, y, _ = _factor_panel(22, 12, 10, 3)
    res = GRSTest().fit(y, f)
    assert res.status == "too_little_data"
    assert np.isnan(res.grs_f) and res.message


# --------------------------------------------------------------------------- #
# Fama-MacBeth
# --------------------------------------------------------------------------- #
def test_fama_macbeth_matches_period_by_period_statsmodels():
    # Reference twin: statsmodels OLS of each period's cross-section on first-pass betas.
    f, y, _ = _factor_panel(30, 120, 15, 3)
    for intercept in (False, True):
        ours = FamaMacBeth(intercept=intercept).fit(y, f)
        betas = np.array([sm.OLS(y[:, i], sm.add_constant(f)).fit().params[1:] for i in range(15)])
        z = sm.add_constant(betas) if intercept else betas
        path = np.array([sm.OLS(y[t], z).fit().params for t in range(120)])
        sl = slice(1, None) if intercept else slice(None)
        np.testing.assert_allclose(ours.premia_path, path[:, sl], rtol=0, atol=1e-12)
        np.testing.assert_allclose(ours.premia, path.mean(0)[sl], rtol=0, atol=1e-12)
        np.testing.assert_allclose(ours.premia_se_fm, path.std(0, ddof=1)[sl] / np.sqrt(120), rtol=1e-10)
        if intercept:
            np.testing.assert_allclose(ours.zero_beta_rate, path.mean(0)[0], rtol=0, atol=1e-12)


def test_shanken_errors_agree_with_linearmodels_gmm_under_homoskedasticity():
    # Reference: linearmodels LinearFactorModel risk_premia_se (GMM, robust). With iid
    # homoskedastic errors it estimates the same asymptotic variance as Shanken (1992);
    # tolerance 3% for sampling differences between the two estimators. High factor Sharpe
    # ratios make the correction large, so the uncorrected errors are off by more.
    f, y, _ = _factor_panel(0, 4000, 12, 2, mean=0.018, sd=0.035, noise=0.06)
    ours = FamaMacBeth().fit(y, f)
    ref = LinearFactorModel(y, f).fit().risk_premia_se.to_numpy()
    np.testing.assert_allclose(ours.premia_se_shanken, ref, rtol=0.03)
    assert np.all(np.abs(ours.premia_se_fm / ref - 1) > 0.03)


def test_fama_macbeth_with_per_period_exposures_recovers_factor_returns():
    # Exact exposures, no noise: each period's cross-section returns f_t itself.
    rng = np.random.default_rng(31)
    t, n, k = 80, 8, 3
    f = rng.normal(0.004, 0.03, (t, k))
    b = rng.normal(1.0, 0.5, (t, n, k))
    y = np.einsum("tnk,tk->tn", b, f)
    ours = FamaMacBeth().fit(y, betas=b, factor_names=("m", "s", "v"))
    np.testing.assert_allclose(ours.premia_path, f, rtol=0, atol=1e-12)
    np.testing.assert_allclose(ours.premia, f.mean(0), rtol=0, atol=1e-12)
    assert np.isnan(ours.premia_se_shanken).all()
    assert ours.factors == ("m", "s", "v")


def test_shanken_with_the_factors_as_test_assets_is_the_variance_of_the_mean():
    # Traded factors priced on themselves: betas = I, residuals 0, so the Shanken
    # covariance is Sigma_f / T (MLE) -- the sampling variance of the factor means.
    rng = np.random.default_rng(32)
    f = rng.normal(0.01, 0.04, (200, 3))
    ours = FamaMacBeth().fit(f, f)
    np.testing.assert_allclose(ours.premia, f.mean(0), rtol=1e-10)
    np.testing.assert_allclose(ours.premia_cov_shanken, np.cov(f, rowvar=False, ddof=0) / 200, rtol=1e-8,
                               atol=1e-14)


# --------------------------------------------------------------------------- #
# Complete-market inversion
# --------------------------------------------------------------------------- #
@settings(max_examples=25, deadline=None, derandomize=True)
@given(seed=st.integers(0, 2**31 - 1), k=st.integers(1, 5), extra=st.integers(0, 4))
def test_inversion_recovers_premia_from_exact_exposures(seed, k, extra):
    rng = np.random.default_rng(seed)
    lam = rng.normal(0.004, 0.003, k)
    b = rng.normal(1.0, 0.6, (k + extra, k)) + 2.0 * np.eye(k + extra, k)
    res = CompleteMarketInversion(max_condition=1e6).fit(b @ lam, b)
    assert res.status == "ok"
    assert res.exactly_identified == (extra == 0)
    np.testing.assert_allclose(res.premia, lam, rtol=1e-9, atol=1e-14)
    np.testing.assert_allclose(res.pricing_errors, 0.0, atol=1e-12)


def test_inversion_refuses_ill_conditioned_or_short_systems():
    rng = np.random.default_rng(40)
    b = rng.normal(1.0, 0.5, (3, 2))
    b_bad = np.column_stack([b[:, 0], b[:, 0] + 1e-6 * rng.normal(size=3)])
    res = CompleteMarketInversion().fit(b_bad @ [0.01, 0.02], b_bad)
    assert res.status == "unidentified"
    assert np.isnan(res.premia).all() and res.condition_number > 1e3
    assert "condition number" in res.message
    short = CompleteMarketInversion().fit(np.array([0.01]), np.array([[1.0, 0.5]]))
    assert short.status == "unidentified" and np.isnan(short.premia).all()


# --------------------------------------------------------------------------- #
# Linear SDF identities (Hansen & Jagannathan 1991)
# --------------------------------------------------------------------------- #
@settings(max_examples=25, deadline=None, derandomize=True)
@given(seed=st.integers(0, 2**31 - 1), k=st.integers(1, 4), ddof=st.sampled_from([0, 1]))
def test_sdf_prices_factors_and_its_volatility_is_the_max_sharpe(seed, k, ddof):
    rng = np.random.default_rng(seed)
    f = rng.normal(0.005, 0.04, (150, k)) @ (np.eye(k) + 0.3 * rng.normal(size=(k, k)))
    est = LinearSDF(ddof=ddof).fit(f)
    m = est.sdf
    np.testing.assert_allclose(m.mean(), 1.0, rtol=0, atol=1e-12)
    np.testing.assert_allclose(est.factor_pricing_errors, 0.0, atol=1e-14)
    mu, sigma = f.mean(0), np.cov(f, rowvar=False, ddof=ddof).reshape(k, k)
    hj = np.sqrt(mu @ np.linalg.solve(sigma, mu))
    np.testing.assert_allclose(m.std(ddof=ddof) / m.mean(), hj, rtol=1e-9)
    np.testing.assert_allclose(est.max_sharpe, hj, rtol=1e-9)
    if ddof == 0:
        # With MLE moments the plain sample average E_T[m f] is zero as well.
        np.testing.assert_allclose((m[:, None] * f).mean(0), 0.0, atol=1e-14)


def test_sdf_pricing_errors_are_time_series_alphas():
    # Reference: statsmodels OLS intercepts and their HAC standard errors.
    f, y, _ = _factor_panel(50, 240, 5, 3, alpha=0.001)
    est = LinearSDF(hac_lags=3).fit(f, y)
    for i in range(5):
        res = sm.OLS(y[:, i], sm.add_constant(f)).fit(cov_type="HAC", cov_kwds={"maxlags": 3})
        np.testing.assert_allclose(est.asset_pricing_errors[i], res.params[0], rtol=1e-9)
        np.testing.assert_allclose(est.asset_pricing_error_se[i], res.bse[0], rtol=1e-8)


def test_capm_is_the_one_factor_case():
    # CAPM: one shock; price of risk per unit of market risk = market Sharpe ratio.
    rng = np.random.default_rng(51)
    mkt = rng.normal(0.006, 0.045, 600)
    beta = np.array([0.6, 0.9, 1.2, 1.5])
    assets = np.outer(mkt, beta)  # exact exposures, no idiosyncratic noise
    sharpe = mkt.mean() / mkt.std(ddof=1)
    sdf = LinearSDF(ddof=1).fit(mkt)
    np.testing.assert_allclose(sdf.hj_ratio, sharpe, rtol=1e-10)
    np.testing.assert_allclose(sdf.b, [mkt.mean() / mkt.var(ddof=1)], rtol=1e-10)
    fm = FamaMacBeth().fit(assets, mkt)
    np.testing.assert_allclose(fm.premia[0] / mkt.std(ddof=1), sharpe, rtol=1e-10)
    inv = CompleteMarketInversion().fit(assets.mean(0), beta[:, None])
    np.testing.assert_allclose(inv.premia[0] / mkt.std(ddof=1), sharpe, rtol=1e-10)


def test_max_sharpe_standard_error():
    # K = 1, iid normal: delta method reduces to Lo (2002) sqrt((1 + SR^2 / 2) / T);
    # tolerance 5% for the sampling error of the fourth moments in the estimate.
    rng = np.random.default_rng(52)
    x = rng.normal(0.02, 0.05, 20000)
    est = LinearSDF().fit(x)
    np.testing.assert_allclose(est.max_sharpe_se, np.sqrt((1 + est.max_sharpe**2 / 2) / 20000), rtol=0.05)
    # K = 3: Monte Carlo spread of the estimate against the average reported error (15%).
    true_mu, sd, t = np.array([0.01, 0.006, 0.004]), 0.04, 400
    draws, ses = [], []
    for _ in range(400):
        r = LinearSDF().fit(rng.normal(true_mu, sd, (t, 3)))
        draws.append(r.max_sharpe)
        ses.append(r.max_sharpe_se)
    np.testing.assert_allclose(np.mean(ses), np.std(draws), rtol=0.15)


# --------------------------------------------------------------------------- #
# Expected excess returns
# --------------------------------------------------------------------------- #
def test_delta_method_variance_against_monte_carlo():
    # Independent estimates beta ~ N(b, Vb), lambda ~ N(l, Vl): exact variance of beta'lambda
    # is b'Vl b + l'Vb l + tr(Vl Vb) (Goodman 1960, variance of a product); 200,000 draws, 2%.
    rng = np.random.default_rng(60)
    b, lam = np.array([1.1, 0.4, -0.3]), np.array([0.005, 0.002, 0.003])
    a = rng.normal(size=(3, 3))
    vb = 0.05 * (a @ a.T + np.eye(3))
    c = rng.normal(size=(3, 3))
    vl = 4e-6 * (c @ c.T + np.eye(3))
    n = 200_000
    bd = rng.multivariate_normal(b, vb, n)
    ld = rng.multivariate_normal(lam, vl, n)
    exact = implied_excess_returns(b, lam, periods_per_year=1, beta_cov=vb, premia_cov=vl,
                                   include_product_term=True)
    np.testing.assert_allclose(exact.se**2, np.var(np.sum(bd * ld, axis=1)), rtol=0.02)
    # Plug-in first-order variance at the estimates averages to the exact variance.
    plug = implied_excess_returns(bd, ld, periods_per_year=1, beta_cov=vb, premia_cov=vl)
    np.testing.assert_allclose(np.mean(plug.se**2) - exact.var_product, exact.se**2, rtol=0.02)
    # Annualisation (common practice: 12 monthly, 252 daily): mean and se scale linearly.
    ann = implied_excess_returns(b, lam, periods_per_year=252, beta_cov=vb, premia_cov=vl,
                                 include_product_term=True)
    np.testing.assert_allclose(ann.expected, 252 * b @ lam, rtol=1e-12)
    np.testing.assert_allclose(ann.se, 252 * exact.se, rtol=1e-12)


def test_implied_returns_broadcast_over_a_history():
    rng = np.random.default_rng(61)
    betas = rng.normal(1.0, 0.3, (50, 4, 2))
    premia = rng.normal(0.0003, 0.0001, (50, 1, 2))
    res = implied_excess_returns(betas, premia, periods_per_year=252)
    assert res.expected.shape == (50, 4)
    np.testing.assert_allclose(res.expected[7, 2], 252 * betas[7, 2] @ premia[7, 0], rtol=1e-12)
    assert np.all(res.se == 0.0)


def test_expected_return_model_against_statsmodels():
    f, y, _ = _factor_panel(62, 300, 4, 2, alpha=0.002)
    frame = pd.DataFrame(y, columns=list("abcd"))
    est = ExpectedReturnModel(periods_per_year=12, hac_lags=4).fit(frame, pd.DataFrame(f, columns=["m", "v"]))
    assert est.status == "ok" and est.assets == ("a", "b", "c", "d")
    for i in range(4):
        # Reference: statsmodels HAC intercept t-statistic (annualising leaves t unchanged).
        res = sm.OLS(y[:, i], sm.add_constant(f)).fit(cov_type="HAC", cov_kwds={"maxlags": 4})
        np.testing.assert_allclose(est.alpha[i], 12 * res.params[0], rtol=1e-9)
        np.testing.assert_allclose(est.alpha_t[i], res.tvalues[0], rtol=1e-8)
        # Reference: statsmodels HAC standard error of a mean (regression on a constant).
        mean_fit = sm.OLS(y[:, i], np.ones(300)).fit(cov_type="HAC", cov_kwds={"maxlags": 4})
        np.testing.assert_allclose(est.realised_mean_se[i], 12 * mean_fit.bse[0], rtol=1e-8)
    # At the sample-mean premia the gap is the alpha (OLS: mean r = a + b' mean f).
    np.testing.assert_allclose(est.gap, est.alpha, rtol=0, atol=1e-12)
    # With other premia the implied return moves and the gap with it.
    other = ExpectedReturnModel(periods_per_year=12, hac_lags=4).fit(y, f, premia=[0.0, 0.0])
    np.testing.assert_allclose(other.implied.expected, 0.0, atol=1e-15)
    np.testing.assert_allclose(other.gap, other.realised_mean, rtol=1e-12)


def test_expected_return_model_too_little_data():
    f, y, _ = _factor_panel(63, 3, 2, 2)
    est = ExpectedReturnModel(periods_per_year=12).fit(y, f)
    assert est.status == "too_little_data"
    assert np.isnan(est.implied.expected).all()
