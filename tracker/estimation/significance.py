"""Significance statistics for factor premia: is an estimate signal or noise?

Everything here is a pure function of numbers or 1-D arrays; results are frozen
dataclasses. Failures (too few observations, zero variance) come back as a result
whose ``status`` is not ``'ok'``, with NaN numeric fields and a plain-words
``message``; nothing here raises on bad data.

Symbols
-------
x_t, t = 1..T : a series (returns, errors) of length T.
SR            : Sharpe ratio mean(x) / sd(x) at the data frequency ("per period").
q             : periods per year (252 daily, 12 monthly -- common practice).

Methods and sources
-------------------
- Newey & West (1987) HAC standard error of a mean, Bartlett kernel.
- Lo (2002) standard error of the Sharpe ratio for iid returns.
- Bailey & Lopez de Prado (2012) probabilistic Sharpe ratio (PSR) and minimum
  track record length (MinTRL).
- Holm (1979), Benjamini & Hochberg (1995), Benjamini & Yekutieli (2001)
  adjusted p-values, through ``statsmodels.stats.multitest.multipletests``.
- Harvey, Liu & Zhu (2016) hurdle t > 3.0 for a newly proposed factor.
- Jarque & Bera (1987) normality and Ljung & Box (1978) serial-correlation
  tests, through statsmodels.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import stats
from statsmodels.stats.diagnostic import acorr_ljungbox
from statsmodels.stats.multitest import multipletests
from statsmodels.stats.stattools import jarque_bera

__all__ = [
    "PERIODS_PER_YEAR",
    "HLZ_HURDLE_T",
    "MeanTest",
    "SharpeEstimate",
    "MultipleTestingResult",
    "ResidualDiagnostics",
    "newey_west_lags",
    "newey_west_mean",
    "long_run_variance",
    "two_sided_p_value",
    "lo_sharpe_se",
    "sharpe_ratio",
    "probabilistic_sharpe_ratio",
    "min_track_record_length",
    "probabilistic_sharpe_ratio_of_returns",
    "years_for_t_stat",
    "adjusted_p_values",
    "adjust_p_values",
    "clears_hurdle",
    "residual_diagnostics",
]

#: Periods per year used to annualise (common practice): mean x q, vol x sqrt(q).
PERIODS_PER_YEAR: dict[str, int] = {
    "daily": 252,
    "weekly": 52,
    "monthly": 12,
    "quarterly": 4,
    "annual": 1,
}

#: Harvey, Liu & Zhu (2016): a newly proposed factor should clear t > 3.0.
HLZ_HURDLE_T: float = 3.0

_NAN = float("nan")


def _finite_1d(x) -> np.ndarray:
    """Flatten to float64 and drop non-finite entries (missing observations)."""
    arr = np.asarray(x, dtype=float).ravel()
    return arr[np.isfinite(arr)]


# --------------------------------------------------------------------------- #
# Newey-West HAC mean test
# --------------------------------------------------------------------------- #


@dataclass(frozen=True)
class MeanTest:
    """Test of H0: E[x] = 0 with a Newey-West (1987) HAC standard error.

    Attributes
    ----------
    status : {'ok', 'too_little_data', 'failed'}
    message : str
        Plain-words reason when ``status != 'ok'``, else ''.
    mean : float
        Sample mean x_bar.
    se : float
        HAC standard error of x_bar.
    t_stat : float
        x_bar / se.
    p_value : float
        Two-sided p-value from the standard normal (asymptotic; this is also
        what statsmodels reports for OLS with ``cov_type='HAC'`` by default).
    n_obs : int
        T, the number of finite observations used.
    lags : int
        Bartlett truncation lag L (weights 1 - j/(L+1), j = 0..L).
    small_sample_correction : bool
        Whether the variance was scaled by T/(T-1).
    """

    status: str
    message: str
    mean: float
    se: float
    t_stat: float
    p_value: float
    n_obs: int
    lags: int
    small_sample_correction: bool


def newey_west_lags(n_obs: int) -> int:
    """Automatic Bartlett lag, L = floor(4 (T/100)^(2/9)).

    This is the rule of thumb in common practice (it is also statsmodels'
    default in ``S_hac_simple``). T = 819 gives L = 6; T = 5000 gives L = 9.
    """
    if n_obs <= 0:
        return 0
    return int(np.floor(4.0 * (n_obs / 100.0) ** (2.0 / 9.0)))


def _bartlett_sum(u: np.ndarray, lags: int) -> float:
    """S = sum_t u_t^2 + 2 sum_{j=1..L} (1 - j/(L+1)) sum_t u_t u_{t-j}."""
    s = float(u @ u)
    for j in range(1, lags + 1):
        s += 2.0 * (1.0 - j / (lags + 1.0)) * float(u[j:] @ u[:-j])
    return s


def long_run_variance(x, lags: int | None = None) -> float:
    """Bartlett-kernel long-run variance of a series, S / T.

    Parameters
    ----------
    x : array_like, shape (T,)
        Series; non-finite entries are dropped.
    lags : int, optional
        Truncation lag L; default :func:`newey_west_lags`.

    Returns
    -------
    float
        (1/T) [gamma_0 T + 2 sum_j w_j gamma_j T] of the demeaned series, i.e.
        T times the squared Newey-West standard error of the mean; NaN when
        T < 2.
    """
    arr = _finite_1d(x)
    n = arr.size
    if n < 2:
        return _NAN
    lag = newey_west_lags(n) if lags is None else int(lags)
    lag = max(0, min(lag, n - 1))
    u = arr - arr.mean()
    return _bartlett_sum(u, lag) / n


def newey_west_mean(
    x, lags: int | None = None, small_sample_correction: bool = False
) -> MeanTest:
    """Mean of a series with a Newey-West (1987) HAC standard error.

    Parameters
    ----------
    x : array_like, shape (T,)
        Series, e.g. factor excess returns. Non-finite entries are dropped
        (treated as missing) before computing.
    lags : int, optional
        Bartlett truncation lag L; default floor(4 (T/100)^(2/9)) (common
        practice). Must be 0 <= L < T.
    small_sample_correction : bool, default False
        Multiply the variance by T/(T-1) (statsmodels' ``use_correction``).

    Returns
    -------
    MeanTest
        se^2 = S / T^2 with S the Bartlett-weighted sum of autocovariances of
        u_t = x_t - x_bar. Identical to OLS of x on a constant with
        ``cov_type='HAC', cov_kwds={'maxlags': L, 'use_correction': c}``.
    """
    arr = _finite_1d(x)
    n = arr.size
    lag = newey_west_lags(n) if lags is None else int(lags)
    if n < 2:
        return MeanTest("too_little_data", f"need at least 2 observations, have {n}",
                        _NAN, _NAN, _NAN, _NAN, n, lag, small_sample_correction)
    if lag < 0 or lag >= n:
        return MeanTest("failed", f"lag {lag} must be between 0 and T-1 = {n - 1}",
                        _NAN, _NAN, _NAN, _NAN, n, lag, small_sample_correction)
    mean = float(arr.mean())
    var = _bartlett_sum(arr - mean, lag) / n**2
    if small_sample_correction:
        var *= n / (n - 1.0)
    if not var > 0.0:
        return MeanTest("failed", "the series has zero variance", mean, _NAN, _NAN,
                        _NAN, n, lag, small_sample_correction)
    se = float(np.sqrt(var))
    t = mean / se
    return MeanTest("ok", "", mean, se, t, two_sided_p_value(t), n, lag,
                    small_sample_correction)


def two_sided_p_value(t_stat):
    """Two-sided standard-normal p-value 2 (1 - Phi(|t|)); vectorised."""
    if np.ndim(t_stat) == 0:         # once per factor per update: erfc(|t| / sqrt 2), as ndtr
        return math.erfc(abs(float(t_stat)) / math.sqrt(2.0))
    p = 2.0 * stats.norm.sf(np.abs(np.asarray(t_stat, dtype=float)))
    return float(p) if np.ndim(p) == 0 else p


# --------------------------------------------------------------------------- #
# Sharpe ratio, Lo (2002), PSR and MinTRL (Bailey & Lopez de Prado 2012)
# --------------------------------------------------------------------------- #


@dataclass(frozen=True)
class SharpeEstimate:
    """Sample Sharpe ratio with its Lo (2002) iid standard error.

    Attributes
    ----------
    status : {'ok', 'too_little_data', 'failed'}
    message : str
    mean, sd : float
        Per-period sample mean and standard deviation (ddof = 1).
    sr_period : float
        SR = mean / sd at the data frequency.
    sr_annual : float
        SR x sqrt(q).
    se_period : float
        Lo (2002): sqrt((1 + SR^2 / 2) / T), SR per period.
    se_annual : float
        se_period x sqrt(q) (the same scaling as the ratio itself).
    t_stat : float
        sr_period / se_period (equals sr_annual / se_annual).
    n_obs : int
        T.
    periods_per_year : float
        q.
    skewness : float
        Sample skewness (biased moment estimator), for PSR.
    kurtosis : float
        Sample kurtosis, NON-excess (Pearson; normal = 3), for PSR.
    """

    status: str
    message: str
    mean: float
    sd: float
    sr_period: float
    sr_annual: float
    se_period: float
    se_annual: float
    t_stat: float
    n_obs: int
    periods_per_year: float
    skewness: float
    kurtosis: float


def lo_sharpe_se(sr_period, n_obs):
    """Lo (2002) iid standard error of a Sharpe ratio, sqrt((1 + SR^2/2) / T).

    Parameters
    ----------
    sr_period : float or ndarray
        Sharpe ratio at the data frequency (not annualised).
    n_obs : int or ndarray
        T.

    Returns
    -------
    float or ndarray
        Standard error of the per-period SR. Multiply by sqrt(q) to annualise.
    """
    sr = np.asarray(sr_period, dtype=float)
    out = np.sqrt((1.0 + 0.5 * sr**2) / np.asarray(n_obs, dtype=float))
    return float(out) if np.ndim(out) == 0 else out


def sharpe_ratio(returns, periods_per_year: float = 12) -> SharpeEstimate:
    """Per-period and annualised Sharpe ratio of excess returns, with Lo SE.

    Parameters
    ----------
    returns : array_like, shape (T,)
        Excess returns at one frequency; non-finite entries are dropped.
    periods_per_year : float, default 12
        q: 252 daily, 12 monthly (common practice; see ``PERIODS_PER_YEAR``).
    """
    arr = _finite_1d(returns)
    n = arr.size
    q = float(periods_per_year)
    nan_fields = dict(sr_period=_NAN, sr_annual=_NAN, se_period=_NAN, se_annual=_NAN,
                      t_stat=_NAN, n_obs=n, periods_per_year=q)
    if n < 3:
        return SharpeEstimate("too_little_data", f"need at least 3 returns, have {n}",
                              mean=_NAN, sd=_NAN, skewness=_NAN, kurtosis=_NAN,
                              **nan_fields)
    mean = float(arr.mean())
    sd = float(arr.std(ddof=1))
    if not sd > 0.0:
        return SharpeEstimate("failed", "returns have zero variance", mean=mean, sd=sd,
                              skewness=_NAN, kurtosis=_NAN, **nan_fields)
    sr = mean / sd
    se = lo_sharpe_se(sr, n)
    root_q = np.sqrt(q)
    return SharpeEstimate(
        "ok", "", mean=mean, sd=sd, sr_period=sr, sr_annual=float(sr * root_q),
        se_period=se, se_annual=float(se * root_q), t_stat=sr / se, n_obs=n,
        periods_per_year=q, skewness=float(stats.skew(arr)),
        kurtosis=float(stats.kurtosis(arr, fisher=False)),
    )


def _psr_denominator(sr, skewness, kurtosis):
    """1 - g3 SR + (g4 - 1)/4 SR^2; g4 is non-excess kurtosis."""
    return 1.0 - skewness * sr + 0.25 * (kurtosis - 1.0) * sr**2


def probabilistic_sharpe_ratio(
    sr_period: float,
    sr_benchmark: float,
    n_obs: float,
    skewness: float = 0.0,
    kurtosis: float = 3.0,
) -> float:
    """Bailey & Lopez de Prado (2012) probabilistic Sharpe ratio.

    PSR(SR*) = Phi( (SR - SR*) sqrt(T - 1) / sqrt(1 - g3 SR + (g4 - 1)/4 SR^2) )

    Parameters
    ----------
    sr_period : float
        Observed SR at the data frequency (not annualised).
    sr_benchmark : float
        SR*, the benchmark at the same frequency (divide an annual one by sqrt(q)).
    n_obs : float
        T, number of returns.
    skewness : float, default 0
        g3, sample skewness of the returns.
    kurtosis : float, default 3
        g4, NON-excess (Pearson) kurtosis; 3 for normal returns. Pass
        excess kurtosis + 3 if you have excess kurtosis.

    Returns
    -------
    float
        Probability that the true SR exceeds SR*; NaN when T < 2 or the
        variance term is not positive (extreme skew).
    """
    denom = _psr_denominator(sr_period, skewness, kurtosis)
    if not (n_obs >= 2 and denom > 0.0):
        return _NAN
    z = (sr_period - sr_benchmark) * np.sqrt(n_obs - 1.0) / np.sqrt(denom)
    return float(stats.norm.cdf(z))


def min_track_record_length(
    sr_period: float,
    sr_benchmark: float,
    confidence: float = 0.95,
    skewness: float = 0.0,
    kurtosis: float = 3.0,
) -> float:
    """Bailey & Lopez de Prado (2012) minimum track record length.

    MinTRL = 1 + (1 - g3 SR + (g4 - 1)/4 SR^2) (z_c / (SR - SR*))^2,

    the T at which PSR(SR*) equals ``confidence``. Same conventions as
    :func:`probabilistic_sharpe_ratio` (per-period SR, non-excess kurtosis).

    Returns
    -------
    float
        Number of observations (divide by q for years). ``inf`` when
        SR <= SR* (no track record is long enough); NaN when the variance
        term is not positive or confidence is outside (0.5, 1).
    """
    denom = _psr_denominator(sr_period, skewness, kurtosis)
    if not (0.5 < confidence < 1.0 and denom > 0.0):
        return _NAN
    if sr_period <= sr_benchmark:
        return float("inf")
    z = stats.norm.ppf(confidence)
    return float(1.0 + denom * (z / (sr_period - sr_benchmark)) ** 2)


def probabilistic_sharpe_ratio_of_returns(returns, sr_benchmark: float = 0.0) -> float:
    """PSR from a return series, using its sample skewness and kurtosis.

    Parameters
    ----------
    returns : array_like, shape (T,)
    sr_benchmark : float
        SR* per period.
    """
    est = sharpe_ratio(returns, periods_per_year=1)
    if est.status != "ok":
        return _NAN
    return probabilistic_sharpe_ratio(est.sr_period, sr_benchmark, est.n_obs,
                                      est.skewness, est.kurtosis)


def years_for_t_stat(sharpe_annual, t_target: float = 2.0):
    """Years of data for the t-stat of the mean to reach ``t_target``: (t / SR)^2.

    With iid returns t = SR_annual sqrt(years), so SR 0.3 needs about 44 years
    for t = 2. Vectorised; SR = 0 gives ``inf``.
    """
    if np.ndim(sharpe_annual) == 0:          # the per-date rules call this once a row
        sr = abs(float(sharpe_annual))
        return math.inf if sr == 0.0 else (t_target / sr) ** 2
    sr = np.abs(np.asarray(sharpe_annual, dtype=float))
    with np.errstate(divide="ignore"):
        out = (t_target / sr) ** 2
    return float(out) if np.ndim(out) == 0 else out


# --------------------------------------------------------------------------- #
# Multiple testing across the tracked set
# --------------------------------------------------------------------------- #

#: Our method names -> statsmodels ``multipletests`` method names.
_METHODS = {"holm": "holm", "fdr_bh": "fdr_bh", "fdr_by": "fdr_by"}


def adjusted_p_values(p_values, method: str = "fdr_by") -> np.ndarray:
    """Adjusted p-values for one method; NaN inputs are left out and stay NaN.

    Parameters
    ----------
    p_values : array_like, shape (m,)
        Raw p-values of the tracked set; m counts only the finite ones.
    method : {'holm', 'fdr_bh', 'fdr_by'}
        Holm (1979), Benjamini & Hochberg (1995), Benjamini & Yekutieli (2001).

    Returns
    -------
    ndarray, shape (m,)
    """
    if method not in _METHODS:
        raise ValueError(f"unknown method {method!r}; use one of {sorted(_METHODS)}")
    p = np.asarray(p_values, dtype=float).ravel()
    out = np.full(p.shape, np.nan)
    ok = np.isfinite(p)
    if ok.any():
        out[ok] = multipletests(p[ok], method=_METHODS[method])[1]
    return out


@dataclass(frozen=True)
class MultipleTestingResult:
    """Raw and adjusted p-values for the tracked set, all arrays of shape (m,).

    Attributes
    ----------
    p_values : ndarray
        Raw p-values (NaN = not available; such entries are left out of the
        adjustment and are never significant).
    p_holm, p_bh, p_by : ndarray
        Holm (1979), BH (1995), BY (2001) adjusted p-values.
    alpha : float
        Level (family-wise for Holm, false discovery rate for BH/BY).
    significant_alone : ndarray of bool
        p <= alpha.
    significant_holm, significant_bh, significant_by : ndarray of bool
        Rejections reported by ``multipletests`` at ``alpha``.
    lost_holm, lost_bh, lost_by : ndarray of bool
        Significant alone but not after that adjustment.
    n_tests : int
        Number of finite p-values (the m used in the adjustment).
    """

    p_values: np.ndarray
    p_holm: np.ndarray
    p_bh: np.ndarray
    p_by: np.ndarray
    alpha: float
    significant_alone: np.ndarray
    significant_holm: np.ndarray
    significant_bh: np.ndarray
    significant_by: np.ndarray
    lost_holm: np.ndarray
    lost_bh: np.ndarray
    lost_by: np.ndarray
    n_tests: int


def adjust_p_values(p_values, alpha: float = 0.05) -> MultipleTestingResult:
    """Holm, BH and BY adjustments of the tracked set's p-values at ``alpha``.

    A thin wrapper over ``statsmodels.stats.multitest.multipletests``.
    """
    p = np.asarray(p_values, dtype=float).ravel()
    ok = np.isfinite(p)
    adjusted, rejected = {}, {}
    for name, sm_name in _METHODS.items():
        adj = np.full(p.shape, np.nan)
        rej = np.zeros(p.shape, dtype=bool)
        if ok.any():
            r, a = multipletests(p[ok], alpha=alpha, method=sm_name)[:2]
            adj[ok], rej[ok] = a, r
        adjusted[name], rejected[name] = adj, rej
    alone = ok & (np.where(ok, p, 1.0) <= alpha)
    return MultipleTestingResult(
        p_values=p, p_holm=adjusted["holm"], p_bh=adjusted["fdr_bh"],
        p_by=adjusted["fdr_by"], alpha=float(alpha), significant_alone=alone,
        significant_holm=rejected["holm"], significant_bh=rejected["fdr_bh"],
        significant_by=rejected["fdr_by"], lost_holm=alone & ~rejected["holm"],
        lost_bh=alone & ~rejected["fdr_bh"], lost_by=alone & ~rejected["fdr_by"],
        n_tests=int(ok.sum()),
    )


def clears_hurdle(t_stat, hurdle: float = HLZ_HURDLE_T):
    """|t| > hurdle (Harvey, Liu & Zhu 2016: 3.0 for a new factor); vectorised."""
    out = np.abs(np.asarray(t_stat, dtype=float)) > hurdle
    return bool(out) if np.ndim(out) == 0 else out


# --------------------------------------------------------------------------- #
# Residual diagnostics of standardized one-step errors
# --------------------------------------------------------------------------- #


@dataclass(frozen=True)
class ResidualDiagnostics:
    """Normality and serial-correlation checks of standardized one-step errors.

    Attributes
    ----------
    status : {'ok', 'too_little_data'}
    message : str
    n_obs : int
        T, finite errors used.
    lags : int
        Ljung-Box lag count.
    jb_stat, jb_p_value : float
        Jarque-Bera statistic and p-value (H0: normal).
    skewness, kurtosis : float
        Sample skewness and NON-excess kurtosis (normal = 3).
    lb_stat, lb_p_value : float
        Ljung-Box Q at ``lags`` and its p-value (H0: no autocorrelation).
    """

    status: str
    message: str
    n_obs: int
    lags: int
    jb_stat: float
    jb_p_value: float
    skewness: float
    kurtosis: float
    lb_stat: float
    lb_p_value: float


#: Fewer standardized errors than this and the tests are not run.
MIN_DIAGNOSTIC_OBS = 20


def residual_diagnostics(standardized_errors, lags: int | None = None) -> ResidualDiagnostics:
    """Jarque-Bera and Ljung-Box tests of standardized one-step errors.

    Parameters
    ----------
    standardized_errors : array_like, shape (T,)
        v_t / sqrt(F_t) from a filter; non-finite entries are dropped.
    lags : int, optional
        Ljung-Box lags; default min(10, T // 5) (common practice).
    """
    e = _finite_1d(standardized_errors)
    n = e.size
    lag = min(10, n // 5) if lags is None else int(lags)
    if n < MIN_DIAGNOSTIC_OBS or lag < 1 or lag >= n - 1:
        return ResidualDiagnostics(
            "too_little_data",
            f"need at least {MIN_DIAGNOSTIC_OBS} errors and 1 <= lags < T - 1 "
            f"(have T = {n}, lags = {lag})",
            n, lag, _NAN, _NAN, _NAN, _NAN, _NAN, _NAN)
    jb, jb_p, skew, kurt = jarque_bera(e)
    lb = acorr_ljungbox(e, lags=[lag], return_df=True)
    return ResidualDiagnostics(
        "ok", "", n, lag, float(jb), float(jb_p), float(skew), float(kurt),
        float(lb["lb_stat"].iloc[0]), float(lb["lb_pvalue"].iloc[0]))
