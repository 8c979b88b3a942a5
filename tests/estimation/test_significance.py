"""Tests of tracker.estimation.significance.

Reference twins: statsmodels (OLS with HAC covariance, multipletests,
jarque_bera, acorr_ljungbox). Real data: linearmodels' shipped monthly US
factors. Simulations use seeded numpy Generators with known truth.
"""

import math

import numpy as np
import pytest
import statsmodels.api as sm
from scipy import stats
from statsmodels.stats import sandwich_covariance
from statsmodels.stats.diagnostic import acorr_ljungbox
from statsmodels.stats.multitest import multipletests
from statsmodels.stats.stattools import jarque_bera

from tracker.estimation import significance as sig


def ar1(rng, n, phi, scale=1.0, mean=0.0):
    """AR(1) series with unit-variance normal innovations times ``scale``."""
    e = rng.standard_normal(n) * scale
    x = np.empty(n)
    x[0] = e[0] / math.sqrt(1 - phi**2)
    for t in range(1, n):
        x[t] = phi * x[t - 1] + e[t]
    return x + mean


# --------------------------------------------------------------------------- #
# Newey-West
# --------------------------------------------------------------------------- #


@pytest.mark.parametrize("lags", [0, 3, 12])
@pytest.mark.parametrize("correction", [False, True])
def test_newey_west_equals_statsmodels_ols_hac(lags, correction):
    # Reference: statsmodels OLS on a constant, cov_type='HAC'; tolerance 1e-10.
    rng = np.random.default_rng(11)
    x = ar1(rng, 600, 0.4, scale=0.01, mean=0.002)
    ref = sm.OLS(x, np.ones_like(x)).fit(
        cov_type="HAC", cov_kwds={"maxlags": lags, "use_correction": correction})
    got = sig.newey_west_mean(x, lags=lags, small_sample_correction=correction)
    assert got.status == "ok" and got.lags == lags and got.n_obs == 600
    np.testing.assert_allclose(got.mean, ref.params[0], rtol=1e-10, atol=0)
    np.testing.assert_allclose(got.se, ref.bse[0], rtol=1e-10, atol=0)
    np.testing.assert_allclose(got.t_stat, ref.tvalues[0], rtol=1e-10, atol=0)
    np.testing.assert_allclose(got.p_value, ref.pvalues[0], rtol=1e-10, atol=1e-15)


def test_newey_west_default_lag_matches_statsmodels_default():
    # Reference: statsmodels cov_hac_simple with nlags=None uses
    # floor(4 (T/100)^(2/9)); our default must agree (tolerance 1e-10).
    rng = np.random.default_rng(12)
    x = ar1(rng, 819, 0.2)
    ols = sm.OLS(x, np.ones_like(x)).fit()
    ref_var = sandwich_covariance.cov_hac_simple(ols, nlags=None, use_correction=False)
    got = sig.newey_west_mean(x)
    assert got.lags == 6  # floor(4 * 8.19^(2/9)) = floor(6.39), by hand
    np.testing.assert_allclose(got.se, math.sqrt(ref_var[0, 0]), rtol=1e-10)


def test_newey_west_zero_lags_is_iid_standard_error():
    rng = np.random.default_rng(13)
    x = rng.standard_normal(300)
    got = sig.newey_west_mean(x, lags=0)
    np.testing.assert_allclose(got.se, x.std(ddof=0) / math.sqrt(300), rtol=1e-12)


def test_newey_west_recovers_long_run_variance_of_ar1():
    # Known truth: AR(1) with phi = 0.3 and unit innovations has long-run variance
    # 1 / (1 - phi)^2 = 2.04; Bartlett at the automatic lag is ~5% low at T = 20000,
    # sampling error ~2%, so 10% tolerance. The iid variance 1/(1-phi^2) = 1.10 is
    # far outside it, which is the reason for HAC.
    rng = np.random.default_rng(14)
    x = ar1(rng, 20_000, 0.3)
    truth = 1.0 / (1 - 0.3) ** 2
    got = sig.newey_west_mean(x)
    lrv = got.se**2 * got.n_obs
    assert abs(lrv / truth - 1) < 0.10
    assert abs(x.var() / truth - 1) > 0.3
    np.testing.assert_allclose(sig.long_run_variance(x), lrv, rtol=1e-12)


def test_newey_west_failures_are_results():
    short = sig.newey_west_mean([0.1])
    assert short.status == "too_little_data" and math.isnan(short.se)
    flat = sig.newey_west_mean(np.full(50, 0.01))
    assert flat.status == "failed" and math.isnan(flat.t_stat) and flat.message
    bad_lag = sig.newey_west_mean(np.arange(5.0), lags=5)
    assert bad_lag.status == "failed"


def test_newey_west_drops_missing_values():
    rng = np.random.default_rng(15)
    x = rng.standard_normal(100)
    with_nan = np.concatenate([[np.nan], x, [np.nan]])
    a, b = sig.newey_west_mean(x, lags=2), sig.newey_west_mean(with_nan, lags=2)
    assert b.n_obs == 100 and a.se == b.se


def test_two_sided_p_value_at_196():
    # Common practice: |t| = 1.96 is the 5% two-sided point (tolerance 1e-4).
    assert abs(sig.two_sided_p_value(1.96) - 0.05) < 1e-4
    # 2 (1 - Phi(1.96)) = 0.0499958 from normal tables (value from memory).
    np.testing.assert_allclose(sig.two_sided_p_value(np.array([-1.96, 0.0])),
                               [0.0499958, 1.0], atol=1e-6)


# --------------------------------------------------------------------------- #
# Sharpe ratio and Lo (2002)
# --------------------------------------------------------------------------- #


def test_sharpe_on_linearmodels_french_market():
    # Data: linearmodels.datasets.french, monthly US market excess return 'MktRF'.
    # Reference numbers stated in the project brief: mean .006454, sd .042407,
    # T = 819, annual Sharpe .527 (= mean / sd * sqrt(12), 12 a year: common practice).
    french = pytest.importorskip("linearmodels.datasets.french")
    mkt = french.load()["MktRF"].to_numpy()
    est = sig.sharpe_ratio(mkt, periods_per_year=12)
    assert est.status == "ok" and est.n_obs == 819
    assert abs(est.mean - 0.006454) < 5e-7
    assert abs(est.sd - 0.042407) < 5e-7
    assert abs(est.sr_annual - 0.527) < 1e-3
    # Lo (2002) iid SE from the published numbers, computed here independently.
    sr_pub = 0.006454 / 0.042407
    se_pub = math.sqrt((1 + sr_pub**2 / 2) / 819)
    assert abs(est.se_period - se_pub) < 1e-6  # rounding of the published inputs
    np.testing.assert_allclose(est.se_annual, est.se_period * math.sqrt(12), rtol=1e-12)
    np.testing.assert_allclose(est.t_stat, est.sr_annual / est.se_annual, rtol=1e-12)


def test_lo_standard_error_matches_simulation():
    # Known truth: iid normal returns, per-period SR 0.1, T = 250. Across 4000
    # seeded samples the sd of the estimated SR should match Lo's
    # sqrt((1 + SR^2/2)/T) = 0.0633; Monte Carlo error ~1.1%, tolerance 5%.
    rng = np.random.default_rng(21)
    r = 0.1 + rng.standard_normal((4000, 250))
    srs = r.mean(axis=1) / r.std(axis=1, ddof=1)
    assert abs(srs.std() / sig.lo_sharpe_se(0.1, 250) - 1) < 0.05


def test_sharpe_annualisation_daily():
    rng = np.random.default_rng(22)
    r = 0.0004 + 0.01 * rng.standard_normal(1000)
    d = sig.sharpe_ratio(r, periods_per_year=252)
    np.testing.assert_allclose(d.sr_annual, d.sr_period * math.sqrt(252), rtol=1e-12)
    np.testing.assert_allclose(d.se_annual, d.se_period * math.sqrt(252), rtol=1e-12)
    assert sig.PERIODS_PER_YEAR["daily"] == 252 and sig.PERIODS_PER_YEAR["monthly"] == 12


def test_sharpe_failures_are_results():
    assert sig.sharpe_ratio([0.01, 0.02]).status == "too_little_data"
    flat = sig.sharpe_ratio(np.zeros(30))
    assert flat.status == "failed" and math.isnan(flat.sr_annual)


# --------------------------------------------------------------------------- #
# PSR and MinTRL (Bailey & Lopez de Prado 2012)
# --------------------------------------------------------------------------- #


def test_psr_known_case_from_formula():
    # PSR = Phi((SR - SR*) sqrt(T-1) / sqrt(1 - g3 SR + (g4-1)/4 SR^2)), by hand:
    # SR = 0.1, SR* = 0, T = 101, g3 = -1, g4 = 6 (non-excess) ->
    # denominator 1 + 0.1 + 5/4 * 0.01 = 1.1125, z = 1 / sqrt(1.1125).
    want = stats.norm.cdf(0.1 * 10 / math.sqrt(1.1125))
    got = sig.probabilistic_sharpe_ratio(0.1, 0.0, 101, skewness=-1.0, kurtosis=6.0)
    assert abs(got - want) < 1e-12
    # Normal returns (g3 = 0, g4 = 3) reduce the denominator to Lo's 1 + SR^2/2.
    normal = sig.probabilistic_sharpe_ratio(0.1, 0.0, 101)
    lo = stats.norm.cdf(0.1 / sig.lo_sharpe_se(0.1, 100))
    assert abs(normal - lo) < 1e-12
    # Negative skew and fat tails make the same SR less convincing.
    assert got < normal


def test_psr_properties():
    assert sig.probabilistic_sharpe_ratio(0.08, 0.08, 500, -0.5, 5.0) == 0.5
    psr = [sig.probabilistic_sharpe_ratio(0.08, 0.02, t, -0.5, 5.0) for t in (50, 200, 800)]
    assert psr[0] < psr[1] < psr[2]
    assert math.isnan(sig.probabilistic_sharpe_ratio(0.1, 0.0, 1))


@pytest.mark.parametrize("confidence", [0.9, 0.95, 0.99])
def test_min_track_record_length_gives_confidence(confidence):
    sr, bench, g3, g4 = 0.12, 0.03, -0.7, 7.0
    n = sig.min_track_record_length(sr, bench, confidence, g3, g4)
    assert abs(sig.probabilistic_sharpe_ratio(sr, bench, n, g3, g4) - confidence) < 1e-12
    assert sig.probabilistic_sharpe_ratio(sr, bench, n - 5, g3, g4) < confidence


def test_min_track_record_length_never_when_not_above_benchmark():
    assert sig.min_track_record_length(0.05, 0.05) == math.inf
    assert math.isnan(sig.min_track_record_length(0.1, 0.0, confidence=0.4))


def test_psr_is_calibrated_under_the_null():
    # Known truth: iid normal returns with true SR equal to SR* = 0.05. Then
    # PSR > 0.95 should happen about 5% of the time (4000 seeded samples of
    # T = 250; binomial sd 0.34%, tolerance 1.5 points).
    rng = np.random.default_rng(31)
    r = 0.05 + rng.standard_normal((4000, 250))
    psr = np.array([sig.probabilistic_sharpe_ratio_of_returns(row, 0.05) for row in r])
    assert abs((psr > 0.95).mean() - 0.05) < 0.015


def test_psr_of_returns_uses_non_excess_kurtosis():
    rng = np.random.default_rng(32)
    r = 0.05 + rng.standard_t(5, 400)
    sr = r.mean() / r.std(ddof=1)
    want = sig.probabilistic_sharpe_ratio(
        sr, 0.0, 400, stats.skew(r), stats.kurtosis(r, fisher=False))
    wrong = sig.probabilistic_sharpe_ratio(sr, 0.0, 400, stats.skew(r), stats.kurtosis(r))
    got = sig.probabilistic_sharpe_ratio_of_returns(r, 0.0)
    assert abs(got - want) < 1e-12 and abs(got - wrong) > 1e-6


def test_years_for_t_stat():
    # DESIGN.md: annual SR 0.3 needs about (2/0.3)^2 = 44 years for t = 2.
    assert round(sig.years_for_t_stat(0.3)) == 44
    years = sig.years_for_t_stat(np.array([0.3, 0.5, 1.0]))
    np.testing.assert_allclose(np.array([0.3, 0.5, 1.0]) * np.sqrt(years), 2.0)
    assert sig.years_for_t_stat(0.0) == math.inf


# --------------------------------------------------------------------------- #
# Multiple testing
# --------------------------------------------------------------------------- #


def test_adjustments_equal_multipletests():
    # Reference: statsmodels multipletests on the same inputs (exact).
    rng = np.random.default_rng(41)
    p = np.concatenate([rng.uniform(0, 0.01, 4), rng.uniform(0, 1, 16)])
    res = sig.adjust_p_values(p, alpha=0.05)
    for method, adj, rej in (("holm", res.p_holm, res.significant_holm),
                             ("fdr_bh", res.p_bh, res.significant_bh),
                             ("fdr_by", res.p_by, res.significant_by)):
        ref_rej, ref_adj = multipletests(p, alpha=0.05, method=method)[:2]
        np.testing.assert_array_equal(adj, ref_adj)
        np.testing.assert_array_equal(rej, ref_rej)
        np.testing.assert_array_equal(sig.adjusted_p_values(p, method), ref_adj)
    assert res.n_tests == 20


def test_adjustments_hand_case():
    # By hand, m = 4, alpha = 0.05:
    # Holm: 4(.01)=.04, 3(.02)=.06, then running max .06, .06 -> only the first survives.
    # BH: p_i m / i = .04 for all -> all survive.
    # BY: BH x (1 + 1/2 + 1/3 + 1/4) = .04 x 25/12 = .0833 -> none survives.
    res = sig.adjust_p_values([0.01, 0.02, 0.03, 0.04], alpha=0.05)
    np.testing.assert_allclose(res.p_holm, [0.04, 0.06, 0.06, 0.06], rtol=1e-12)
    np.testing.assert_allclose(res.p_bh, [0.04] * 4, rtol=1e-12)
    np.testing.assert_allclose(res.p_by, [0.04 * 25 / 12] * 4, rtol=1e-12)
    np.testing.assert_array_equal(res.significant_alone, [True] * 4)
    np.testing.assert_array_equal(res.lost_holm, [False, True, True, True])
    np.testing.assert_array_equal(res.lost_bh, [False] * 4)
    np.testing.assert_array_equal(res.lost_by, [True] * 4)


def test_adjustments_leave_missing_out():
    res = sig.adjust_p_values([0.01, np.nan, 0.04])
    ref = multipletests([0.01, 0.04], method="fdr_by")[1]
    np.testing.assert_array_equal(res.p_by[[0, 2]], ref)
    assert math.isnan(res.p_by[1]) and not res.significant_alone[1] and res.n_tests == 2
    with pytest.raises(ValueError):
        sig.adjusted_p_values([0.1], "bonferonni")


def test_hurdle():
    assert sig.HLZ_HURDLE_T == 3.0  # Harvey, Liu & Zhu (2016)
    np.testing.assert_array_equal(sig.clears_hurdle([3.1, 2.9, -3.5, 2.0]),
                                  [True, False, True, False])
    assert sig.clears_hurdle(2.5, hurdle=2.0)


# --------------------------------------------------------------------------- #
# Residual diagnostics
# --------------------------------------------------------------------------- #


def test_residual_diagnostics_equal_statsmodels():
    # Reference twin: statsmodels jarque_bera and acorr_ljungbox (exact).
    rng = np.random.default_rng(51)
    e = rng.standard_normal(300)
    d = sig.residual_diagnostics(e, lags=7)
    jb = jarque_bera(e)
    lb = acorr_ljungbox(e, lags=[7], return_df=True)
    assert (d.jb_stat, d.jb_p_value, d.skewness, d.kurtosis) == tuple(map(float, jb))
    assert d.lb_stat == lb["lb_stat"].iloc[0] and d.lb_p_value == lb["lb_pvalue"].iloc[0]
    assert sig.residual_diagnostics(e).lags == 10  # min(10, T // 5)


def test_residual_diagnostics_detect_known_misfit():
    # Known truth: fat tails (t with 3 df) break normality; AR(1) with phi 0.5
    # breaks independence; iid normal breaks neither (seeded, 1% level).
    rng = np.random.default_rng(52)
    fat = sig.residual_diagnostics(rng.standard_t(3, 500))
    serial = sig.residual_diagnostics(ar1(rng, 500, 0.5))
    clean = sig.residual_diagnostics(rng.standard_normal(500))
    assert fat.jb_p_value < 1e-6 and fat.kurtosis > 3
    assert serial.lb_p_value < 1e-6
    assert clean.jb_p_value > 0.01 and clean.lb_p_value > 0.01


def test_residual_diagnostics_too_little_data():
    d = sig.residual_diagnostics(np.arange(10.0))
    assert d.status == "too_little_data" and math.isnan(d.jb_p_value) and d.message
