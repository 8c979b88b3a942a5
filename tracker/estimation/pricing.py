"""From factor premia to asset expected returns, and tests of the factor model.

Symbols: T periods, N assets (test assets), K factors; all returns are decimal
excess returns per period. Per-period units unless a field says ``annual``.

* :func:`implied_excess_returns` -- ``E[r_i] = beta_i' lambda`` with a
  delta-method variance from both the premia and the exposures.
* :class:`ExpectedReturnModel` -- the same from data, beside the realised mean,
  the gap and the time-series alpha with a Newey-West t-statistic.
* :class:`GRSTest` -- Gibbons, Ross & Shanken (1989) F test of joint alphas and
  a HAC Wald version.
* :class:`FamaMacBeth` -- Fama & MacBeth (1973) two-pass premia with
  Fama-MacBeth and Shanken (1992) standard errors.
* :class:`CompleteMarketInversion` -- ``lambda = B^{-1} mu`` (least squares when
  over-identified) with a condition-number guard.
* :class:`LinearSDF` -- ``m_t = 1 - b'(f_t - E f)``, ``b = Sigma_f^{-1} mu_f``,
  its Hansen & Jagannathan (1991) volatility ratio, which equals the maximal
  Sharpe ratio of the factor span, and pricing errors ``E[m r]``.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy import stats

from tracker.estimation.exposures import (
    RollingExposureModel,
    _as_matrix,
    default_hac_lags,
    long_run_covariance,
    newey_west_weights,
    paired_panels,
)

__all__ = [
    "CompleteMarketInversion",
    "CrossSectionalPremia",
    "ExpectedReturnEstimate",
    "ExpectedReturnModel",
    "FamaMacBeth",
    "GRSTest",
    "ImpliedReturns",
    "InvertedPremia",
    "JointAlphaTest",
    "LinearSDF",
    "SDFEstimate",
    "implied_excess_returns",
]


def _lrv_diag(u: np.ndarray, lags: int) -> np.ndarray:
    """Newey-West sum for each column separately: (T, N) -> (N,); NaN rows count as zero."""
    u = np.where(np.isfinite(u), u, 0.0)
    w = newey_west_weights(lags)
    out = np.sum(u * u, axis=0)
    for j in range(1, min(lags, u.shape[0] - 1) + 1):
        out += 2.0 * w[j] * np.sum(u[j:] * u[:-j], axis=0)
    return out


def _hac_mean(data: np.ndarray, lags: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Column means over finite rows, their Newey-West standard errors and counts.

    The variance of the mean is ``S / n^2`` with ``S`` the Newey-West sum of the
    demeaned series (missing rows zero), as statsmodels ``OLS(y, 1)`` with
    ``cov_type='HAC'`` gives on complete data.
    """
    ok = np.isfinite(data)
    n = ok.sum(axis=0)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.where(ok, data, 0.0).sum(axis=0) / n
        dev = np.where(ok, data - mean, 0.0)
        se = np.sqrt(_lrv_diag(dev, lags)) / n
    return mean, np.where(n > 1, se, np.nan), n


# --------------------------------------------------------------------------- #
# Expected excess returns from exposures and premia
# --------------------------------------------------------------------------- #
@dataclass(frozen=True, eq=False)
class ImpliedReturns:
    """Annualised ``beta' lambda`` and its delta-method uncertainty.

    Attributes
    ----------
    expected, se : ndarray (...)
        ``periods_per_year * beta' lambda`` and its standard error; ``...`` is
        the broadcast shape of the inputs without the factor axis.
    var_from_premia : ndarray (...)
        ``beta' V_lambda beta`` (annualised, i.e. times ``periods_per_year^2``).
    var_from_exposures : ndarray (...)
        ``lambda' V_beta lambda`` (annualised).
    var_product : ndarray (...)
        ``tr(V_lambda V_beta)`` (annualised); in ``se`` only when
        ``include_product_term``.
    periods_per_year : int
    include_product_term : bool
    status, message : str
    """

    expected: np.ndarray
    se: np.ndarray
    var_from_premia: np.ndarray
    var_from_exposures: np.ndarray
    var_product: np.ndarray
    periods_per_year: int
    include_product_term: bool
    status: str
    message: str


def implied_excess_returns(
    betas: Any,
    premia: Any,
    *,
    periods_per_year: int,
    beta_cov: Any | None = None,
    premia_cov: Any | None = None,
    include_product_term: bool = False,
) -> ImpliedReturns:
    """Expected excess returns ``beta' lambda`` with a delta-method variance.

    Parameters
    ----------
    betas : array (..., K)
        Exposures, e.g. (N, K) for one date or (T, N, K) for a history.
    premia : array (..., K)
        Factor premia per period, broadcast against ``betas`` (e.g. (K,), or
        (T, 1, K) for a filtered path against (T, N, K) exposures).
    periods_per_year : int
        252 for daily, 12 for monthly data (common practice).
    beta_cov : array (..., K, K), optional
        Covariance of each exposure vector; zero if omitted.
    premia_cov : array (..., K, K), optional
        Covariance of the premia (a full matrix); zero if omitted.
    include_product_term : bool
        Add ``tr(V_lambda V_beta)``.

    Notes
    -----
    With ``beta`` and ``lambda`` estimated independently,

        Var(beta' lambda) = beta' V_lambda beta + lambda' V_beta lambda + tr(V_lambda V_beta)

    at the true values (the last term is the variance of the product of the
    two errors). Evaluated at the *estimates*, the first two terms already
    contain ``tr(V_lambda V_beta)`` each in expectation, so the first-order
    sum (the default) is, on average, already above the exact variance, and
    adding the product term is more conservative still. Expected return and
    standard error scale with ``periods_per_year`` (means add over periods).
    """
    b = np.asarray(betas, dtype=float)
    lam = np.asarray(premia, dtype=float)
    k = b.shape[-1]
    if lam.shape[-1] != k:
        raise ValueError("betas and premia must have the same number of factors")
    vb = np.zeros(b.shape + (k,)) if beta_cov is None else np.asarray(beta_cov, dtype=float)
    vl = np.zeros(lam.shape + (k,)) if premia_cov is None else np.asarray(premia_cov, dtype=float)
    scale = float(periods_per_year)
    expected = scale * np.einsum("...k,...k->...", b, lam)
    from_premia = scale**2 * np.einsum("...k,...kl,...l->...", b, vl, b)
    from_exposures = scale**2 * np.einsum("...k,...kl,...l->...", lam, vb, lam)
    product = scale**2 * np.einsum("...kl,...lk->...", vl, vb)
    total = from_premia + from_exposures + (product if include_product_term else 0.0)
    se = np.sqrt(np.maximum(total, 0.0))
    n_ok = int(np.sum(np.isfinite(expected) & np.isfinite(se)))
    if n_ok == 0:
        status, message = "too_little_data", "no finite exposure-premium pair"
    else:
        status, message = "ok", f"{n_ok} of {expected.size} expected returns finite"
    return ImpliedReturns(
        expected=expected, se=se, var_from_premia=from_premia, var_from_exposures=from_exposures,
        var_product=product, periods_per_year=int(periods_per_year),
        include_product_term=bool(include_product_term), status=status, message=message,
    )


@dataclass(frozen=True, eq=False)
class ExpectedReturnEstimate:
    """Model-implied versus realised excess returns of each asset (annualised).

    Attributes
    ----------
    assets : tuple (N,); factors : tuple (K,)
    betas, beta_se : ndarray (N, K)
        Full-sample OLS exposures and HAC standard errors.
    premia, premia_se : ndarray (K,)
        Premia used, per period.
    implied : ImpliedReturns
        ``expected`` and ``se`` of shape (N,), annualised.
    realised_mean, realised_mean_se : ndarray (N,)
        Annualised sample mean excess return and its HAC standard error.
    gap : ndarray (N,)
        ``realised_mean - implied.expected``.
    alpha, alpha_se, alpha_t : ndarray (N,)
        Annualised time-series intercept (the pricing error at the sample-mean
        premia), its HAC standard error and t-statistic.
    nobs : ndarray of int (N,)
    hac_lags, periods_per_year : int
    status, message : str
    """

    assets: tuple[str, ...]
    factors: tuple[str, ...]
    betas: np.ndarray
    beta_se: np.ndarray
    premia: np.ndarray
    premia_se: np.ndarray
    implied: ImpliedReturns
    realised_mean: np.ndarray
    realised_mean_se: np.ndarray
    gap: np.ndarray
    alpha: np.ndarray
    alpha_se: np.ndarray
    alpha_t: np.ndarray
    nobs: np.ndarray
    hac_lags: int
    periods_per_year: int
    status: str
    message: str


class ExpectedReturnModel:
    """Expected excess returns of assets from full-sample exposures and given premia.

    Parameters
    ----------
    periods_per_year : int
        252 daily, 12 monthly (common practice).
    hac_lags : int, optional
        Newey-West lag for all standard errors; default rule of thumb of T.
    include_product_term : bool
        See :func:`implied_excess_returns`.
    min_nobs : int, optional
        Fewest rows per asset; default ``max(3 (K + 1), 24)``.
    """

    def __init__(
        self,
        *,
        periods_per_year: int,
        hac_lags: int | None = None,
        include_product_term: bool = False,
        min_nobs: int | None = None,
    ) -> None:
        if periods_per_year <= 0:
            raise ValueError("periods_per_year must be positive")
        self.periods_per_year = int(periods_per_year)
        self.hac_lags = hac_lags
        self.include_product_term = bool(include_product_term)
        self.min_nobs = min_nobs

    def fit(
        self,
        asset_returns: Any,
        factor_returns: Any,
        premia: Any | None = None,
        premia_cov: Any | None = None,
    ) -> ExpectedReturnEstimate:
        """Compare ``beta' lambda`` with each asset's realised mean.

        Parameters
        ----------
        asset_returns : (T, N); factor_returns : (T, K)
        premia : array (K,), optional
            Per-period premia (e.g. the latest filtered premia). Default: the
            factor sample means, in which case ``gap`` equals ``alpha`` on
            complete data.
        premia_cov : array (K, K), optional
            Their covariance; default the HAC covariance of the factor means
            when ``premia`` is omitted, zero otherwise.
        """
        y, f, _, assets, factors = paired_panels(asset_returns, factor_returns)
        n_rows, k = f.shape
        lags = default_hac_lags(n_rows) if self.hac_lags is None else int(self.hac_lags)
        min_nobs = max(3 * (k + 1), 24) if self.min_nobs is None else int(self.min_nobs)
        min_nobs = min(min_nobs, n_rows)
        row_ok = np.all(np.isfinite(f), axis=1)
        if min_nobs < k + 2 or row_ok.sum() < k + 2:
            return self._failed(assets, factors, k, lags, "too_little_data",
                                f"{int(row_ok.sum())} usable rows for {k} factors")
        exp = RollingExposureModel(n_rows, min_nobs=min_nobs, hac_lags=lags).fit(y, f, output_from=n_rows - 1)
        betas = exp.betas[-1]
        beta_cov = exp.beta_cov_last
        if premia is None:
            fm = f[row_ok]
            lam = fm.mean(axis=0)
            lam_cov = long_run_covariance(fm - lam, lags) / fm.shape[0] ** 2
        else:
            lam = np.asarray(premia, dtype=float).reshape(k)
            lam_cov = np.zeros((k, k)) if premia_cov is None else np.asarray(premia_cov, dtype=float)
        implied = implied_excess_returns(
            betas, lam, periods_per_year=self.periods_per_year, beta_cov=beta_cov, premia_cov=lam_cov,
            include_product_term=self.include_product_term,
        )
        usable = np.where(row_ok[:, None], y, np.nan)
        mean, mean_se, _ = _hac_mean(usable, lags)
        ppy = self.periods_per_year
        alpha, alpha_se = exp.alpha[-1] * ppy, exp.alpha_se[-1] * ppy
        with np.errstate(divide="ignore", invalid="ignore"):
            alpha_t = alpha / alpha_se
        ok = exp.cell_status[-1] == 0
        mean = np.where(ok, mean * ppy, np.nan)
        mean_se = np.where(ok, mean_se * ppy, np.nan)
        status = "ok" if ok.any() else exp.status
        message = exp.message.replace("asset-dates", "assets")
        return ExpectedReturnEstimate(
            assets=assets, factors=factors, betas=betas, beta_se=exp.se[-1], premia=lam,
            premia_se=np.sqrt(np.diag(lam_cov)), implied=implied, realised_mean=mean,
            realised_mean_se=mean_se, gap=mean - implied.expected, alpha=alpha, alpha_se=alpha_se,
            alpha_t=alpha_t, nobs=exp.nobs[-1], hac_lags=lags, periods_per_year=ppy,
            status=status, message=message,
        )

    def _failed(self, assets, factors, k, lags, status, message):
        n = len(assets)
        nan_n, nan_nk = np.full(n, np.nan), np.full((n, k), np.nan)
        implied = ImpliedReturns(nan_n, nan_n, nan_n, nan_n, nan_n, self.periods_per_year,
                                 self.include_product_term, status, message)
        return ExpectedReturnEstimate(
            assets, factors, nan_nk, nan_nk, np.full(k, np.nan), np.full(k, np.nan), implied,
            nan_n, nan_n, nan_n, nan_n, nan_n, nan_n, np.zeros(n, dtype=np.int64), lags,
            self.periods_per_year, status, message,
        )


# --------------------------------------------------------------------------- #
# Joint test of alphas
# --------------------------------------------------------------------------- #
@dataclass(frozen=True, eq=False)
class JointAlphaTest:
    """GRS and HAC Wald tests that all time-series alphas are zero.

    Attributes
    ----------
    assets : tuple (N,); factors : tuple (K,)
    alphas, alpha_se : ndarray (N,)
        Per-period intercepts and HAC standard errors.
    grs_f, grs_pvalue : float
        ``F = (T - N - K) / N * a' S^{-1} a / (1 + m' O^{-1} m)`` with MLE
        residual covariance ``S`` and factor covariance ``O`` and factor means
        ``m``; exact ``F(N, T - N - K)`` under iid normal errors.
    grs_df : tuple (int, int)
    wald_stat, wald_pvalue : float
        ``a' V^{-1} a`` with the HAC covariance ``V`` of the alphas,
        asymptotically chi-squared with N degrees of freedom.
    max_sharpe_factors, max_sharpe_all : float
        Maximal per-period Sharpe ratios of the factors, and of factors plus
        assets (MLE moments); ``a' S^{-1} a = max_sharpe_all^2 -
        max_sharpe_factors^2``.
    nobs, hac_lags : int
    status, message : str
    """

    assets: tuple[str, ...]
    factors: tuple[str, ...]
    alphas: np.ndarray
    alpha_se: np.ndarray
    grs_f: float
    grs_pvalue: float
    grs_df: tuple[int, int]
    wald_stat: float
    wald_pvalue: float
    max_sharpe_factors: float
    max_sharpe_all: float
    nobs: int
    hac_lags: int
    status: str
    message: str


class GRSTest:
    """Gibbons, Ross & Shanken (1989) test of zero alphas for traded factors.

    Parameters
    ----------
    hac_lags : int
        Newey-West lag of the Wald version (0 = White).
    debiased : bool
        Scale the Wald covariance by ``T / (T - K - 1)`` (as linearmodels'
        ``debiased=True``).

    Notes
    -----
    Uses the rows where every asset and factor is observed. With
    conditionally homoskedastic errors the classical covariance of the alphas
    is ``(1 + m' O^{-1} m) S / T``; the Wald statistic built from it is ``W0 =
    T a' S^{-1} a / (1 + m' O^{-1} m)`` and ``F = (T - N - K) / (N T) W0``: the
    F statistic is the Wald statistic rescaled to its exact finite-sample law.
    """

    def __init__(self, *, hac_lags: int = 0, debiased: bool = True) -> None:
        self.hac_lags = int(hac_lags)
        self.debiased = bool(debiased)

    def fit(self, asset_returns: Any, factor_returns: Any) -> JointAlphaTest:
        """Run both tests.

        Parameters
        ----------
        asset_returns : (T, N) test-asset excess returns
        factor_returns : (T, K) traded factor excess returns
        """
        y, f, _, assets, factors = paired_panels(asset_returns, factor_returns)
        rows = np.all(np.isfinite(y), axis=1) & np.all(np.isfinite(f), axis=1)
        y, f = y[rows], f[rows]
        n_obs, n = y.shape
        k = f.shape[1]
        if n_obs <= n + k:
            return self._failed(assets, factors, n_obs, "too_little_data",
                                f"GRS needs more rows ({n_obs}) than assets plus factors ({n + k})")
        x = np.column_stack([np.ones(n_obs), f])
        xtx_inv = np.linalg.pinv(x.T @ x)
        coef = xtx_inv @ x.T @ y
        resid = y - x @ coef
        alphas = coef[0]
        sigma = resid.T @ resid / n_obs
        mu = f.mean(axis=0)
        omega = np.cov(f, rowvar=False, ddof=0).reshape(k, k)
        if np.linalg.cond(sigma) > 1e12 or np.linalg.cond(omega) > 1e12:
            return self._failed(assets, factors, n_obs, "unidentified",
                                "the residual or factor covariance matrix is singular")
        sr2_f = float(mu @ np.linalg.solve(omega, mu))
        quad = float(alphas @ np.linalg.solve(sigma, alphas))
        df2 = n_obs - n - k
        grs_f = df2 / n * quad / (1.0 + sr2_f)
        # Influence of each row on the alphas: first row of (X'X)^{-1} x_t times e_t.
        influence = (x @ xtx_inv[0])[:, None] * resid
        v = long_run_covariance(influence, self.hac_lags)
        if self.debiased:
            v *= n_obs / (n_obs - k - 1)
        wald = float(alphas @ np.linalg.solve(v, alphas))
        all_ret = np.column_stack([f, y])
        mu_all = all_ret.mean(axis=0)
        sr2_all = float(mu_all @ np.linalg.solve(np.cov(all_ret, rowvar=False, ddof=0), mu_all))
        return JointAlphaTest(
            assets=assets, factors=factors, alphas=alphas, alpha_se=np.sqrt(np.diag(v)),
            grs_f=grs_f, grs_pvalue=float(stats.f.sf(grs_f, n, df2)), grs_df=(n, df2),
            wald_stat=wald, wald_pvalue=float(stats.chi2.sf(wald, n)),
            max_sharpe_factors=float(np.sqrt(sr2_f)), max_sharpe_all=float(np.sqrt(sr2_all)),
            nobs=n_obs, hac_lags=self.hac_lags, status="ok",
            message=f"{n} assets, {k} factors, {n_obs} complete rows",
        )

    def _failed(self, assets, factors, n_obs, status, message):
        nan_n = np.full(len(assets), np.nan)
        return JointAlphaTest(assets, factors, nan_n, nan_n, np.nan, np.nan, (len(assets), 0),
                              np.nan, np.nan, np.nan, np.nan, n_obs, self.hac_lags, status, message)


# --------------------------------------------------------------------------- #
# Fama-MacBeth two-pass premia
# --------------------------------------------------------------------------- #
@dataclass(frozen=True, eq=False)
class CrossSectionalPremia:
    """Two-pass cross-sectional factor premia (per period).

    Attributes
    ----------
    assets : tuple (N,); factors : tuple (K,)
    premia : ndarray (K,)
        Mean of the per-period cross-sectional slopes ``lambda_t``.
    premia_cov_fm, premia_se_fm : ndarray (K, K), (K,)
        Fama-MacBeth covariance: Newey-West sum of ``lambda_t - lambda`` over
        ``n (n - 1)`` (lag 0: sample covariance over n).
    premia_cov_shanken, premia_se_shanken : ndarray (K, K), (K,)
        Shanken (1992) errors-in-variables covariance; NaN when exposures were
        given rather than estimated in the first pass.
    premia_t_fm, premia_t_shanken : ndarray (K,)
    zero_beta_rate, zero_beta_se_fm, zero_beta_se_shanken : float
        Cross-sectional intercept (NaN unless ``intercept=True``).
    premia_path : ndarray (T, K)
        ``lambda_t`` per period (NaN where too few assets).
    pricing_errors : ndarray (N,)
        Mean excess return less fitted ``z_i' lambda``.
    cross_sectional_r2 : float
    betas : ndarray (N, K) or (T, N, K)
        Exposures used.
    nobs : int
        Periods with a cross-sectional estimate.
    status, message : str
    """

    assets: tuple[str, ...]
    factors: tuple[str, ...]
    premia: np.ndarray
    premia_cov_fm: np.ndarray
    premia_se_fm: np.ndarray
    premia_cov_shanken: np.ndarray
    premia_se_shanken: np.ndarray
    premia_t_fm: np.ndarray
    premia_t_shanken: np.ndarray
    zero_beta_rate: float
    zero_beta_se_fm: float
    zero_beta_se_shanken: float
    premia_path: np.ndarray
    pricing_errors: np.ndarray
    cross_sectional_r2: float
    betas: np.ndarray
    nobs: int
    status: str
    message: str


class FamaMacBeth:
    """Fama & MacBeth (1973) two-pass premia.

    Parameters
    ----------
    intercept : bool
        Estimate a cross-sectional intercept (zero-beta excess return). False
        (default) imposes that an asset with zero exposures earns zero excess
        return, as linearmodels' ``LinearFactorModel(risk_free=False)``.
    hac_lags : int
        Newey-West lag for the Fama-MacBeth standard errors (0 = classic).

    Notes
    -----
    First pass: full-sample time-series OLS of each asset on the factors with a
    constant. Second pass: OLS of ``r_t`` on the exposures each period. With
    constant exposures the mean of ``lambda_t`` equals the single OLS of the
    mean returns on the exposures. Shanken (1992):
    ``V = [(1 + c) H S_e H' + S_f~] / T``, ``H = (Z'Z)^{-1} Z'``,
    ``c = lambda' S_f^{-1} lambda``, ``S_e`` the residual and ``S_f`` the factor
    covariance (MLE), ``S_f~`` ``S_f`` bordered by zeros for the intercept.
    """

    def __init__(self, *, intercept: bool = False, hac_lags: int = 0) -> None:
        self.intercept = bool(intercept)
        self.hac_lags = int(hac_lags)

    def fit(self, asset_returns: Any, factor_returns: Any | None = None, *, betas: Any | None = None,
            factor_names: tuple[str, ...] | None = None) -> CrossSectionalPremia:
        """Estimate premia.

        Parameters
        ----------
        asset_returns : (T, N)
        factor_returns : (T, K), optional
            Needed for the first pass and for the Shanken correction.
        betas : array (N, K) or (T, N, K), optional
            Exposures to use instead of the first pass; a (T, N, K) array
            gives per-period exposures (pass ones known before period t for
            a real-time estimate).
        factor_names : tuple of str, optional
            Names when only ``betas`` are given.
        """
        y, _, assets = _as_matrix(asset_returns, "asset_returns")
        n_rows, n_assets = y.shape
        resid = None
        f = None
        if betas is None:
            if factor_returns is None:
                raise ValueError("give factor_returns or betas")
            y, f, _, assets, factors = paired_panels(asset_returns, factor_returns)
            k = f.shape[1]
            first = RollingExposureModel(n_rows, min_nobs=min(n_rows, k + 3), hac_lags=0).fit(
                y, f, output_from=n_rows - 1)
            b = first.betas[-1]
            resid = y - first.alpha[-1] - f @ np.where(np.isfinite(b), b, 0.0).T
        else:
            b = np.asarray(betas, dtype=float)
            k = b.shape[-1]
            if factor_returns is not None:
                y, f, _, assets, factors = paired_panels(asset_returns, factor_returns)
            else:
                factors = factor_names or tuple(f"f{j}" for j in range(k))
            if b.shape[-2] != n_assets or (b.ndim == 3 and b.shape[0] != n_rows):
                raise ValueError("betas must be (N, K) or (T, N, K) matching asset_returns")
        q = k + int(self.intercept)
        z = np.concatenate([np.ones(b.shape[:-1] + (1,)), b], axis=-1) if self.intercept else b
        zt = np.broadcast_to(z, (n_rows, n_assets, q))
        use = np.isfinite(y) & np.all(np.isfinite(zt), axis=-1)
        zz = np.where(use[:, :, None], zt, 0.0)
        yz = np.where(use, y, 0.0)
        gram = np.einsum("tna,tnb->tab", zz, zz)
        rhs = np.einsum("tna,tn->ta", zz, yz)
        enough = use.sum(axis=1) >= q
        path = np.full((n_rows, q), np.nan)
        if enough.any():
            conds = np.linalg.cond(gram[enough])
            good = np.flatnonzero(enough)[conds < 1e12]
            if good.size:
                path[good] = np.linalg.solve(gram[good], rhs[good][:, :, None])[:, :, 0]
        rows = np.all(np.isfinite(path), axis=1)
        n_per = int(rows.sum())
        if n_per < 2:
            return self._failed(assets, factors, k, n_rows, b, "unidentified" if enough.any() else "too_little_data",
                                f"{n_per} periods with an identified cross-section")
        lam = path[rows].mean(axis=0)
        cov_fm = long_run_covariance(path[rows] - lam, self.hac_lags) / (n_per * (n_per - 1))

        cov_sh = np.full((q, q), np.nan)
        if resid is not None and b.ndim == 2:
            cov_sh = self._shanken(f, resid, z, lam, use, k)

        mean_r = np.nanmean(np.where(use, y, np.nan), axis=0)
        zbar = z if z.ndim == 2 else np.nanmean(np.where(use[:, :, None], zt, np.nan), axis=0)
        errors = mean_r - zbar @ lam
        dev = mean_r - np.nanmean(mean_r)
        r2 = float(1.0 - np.nansum(errors**2) / np.nansum(dev**2))
        sl = slice(int(self.intercept), None)
        se_fm = np.sqrt(np.diag(cov_fm))
        se_sh = np.sqrt(np.diag(cov_sh))
        zb = float(lam[0]) if self.intercept else np.nan
        return CrossSectionalPremia(
            assets=assets, factors=factors, premia=lam[sl], premia_cov_fm=cov_fm[sl, sl],
            premia_se_fm=se_fm[sl], premia_cov_shanken=cov_sh[sl, sl], premia_se_shanken=se_sh[sl],
            premia_t_fm=lam[sl] / se_fm[sl], premia_t_shanken=lam[sl] / se_sh[sl],
            zero_beta_rate=zb, zero_beta_se_fm=float(se_fm[0]) if self.intercept else np.nan,
            zero_beta_se_shanken=float(se_sh[0]) if self.intercept else np.nan,
            premia_path=path[:, sl], pricing_errors=errors, cross_sectional_r2=r2, betas=b,
            nobs=n_per, status="ok",
            message=f"{n_per} of {n_rows} periods with a cross-section of at least {q} assets",
        )

    def _shanken(self, f, resid, z, lam, use, k):
        frows = np.all(np.isfinite(f), axis=1)
        fm = f[frows]
        n_t = fm.shape[0]
        sig_f = np.cov(fm, rowvar=False, ddof=0).reshape(k, k)
        lam_f = lam[int(self.intercept):]
        c = float(lam_f @ np.linalg.solve(sig_f, lam_f))
        seen = use & np.isfinite(resid)
        e = np.where(seen, resid, 0.0)
        m = seen.astype(float)
        pair = np.maximum(m.T @ m, 1.0)
        sig_e = (e.T @ e) / pair
        zok = np.where(np.isfinite(z), z, 0.0)
        h = np.linalg.solve(zok.T @ zok, zok.T)
        q = z.shape[1]
        bordered = np.zeros((q, q))
        bordered[q - k:, q - k:] = sig_f
        return ((1.0 + c) * h @ sig_e @ h.T + bordered) / n_t

    def _failed(self, assets, factors, k, n_rows, b, status, message):
        nk, nkk = np.full(k, np.nan), np.full((k, k), np.nan)
        return CrossSectionalPremia(assets, factors, nk, nkk, nk, nkk, nk, nk, nk, np.nan, np.nan,
                                    np.nan, np.full((n_rows, k), np.nan), np.full(len(assets), np.nan),
                                    np.nan, b, 0, status, message)


# --------------------------------------------------------------------------- #
# Complete-market inversion
# --------------------------------------------------------------------------- #
@dataclass(frozen=True, eq=False)
class InvertedPremia:
    """Premia solved from mean excess returns and exposures.

    Attributes
    ----------
    premia : ndarray (K,)
        ``B^{-1} mu`` (N = K) or the least-squares solution (N > K).
    premia_cov : ndarray (K, K)
        ``B^+ V_mu B^+'`` when the mean covariance was given, else NaN.
    pricing_errors : ndarray (N,)
        ``mu - B lambda`` (zero when exactly identified).
    condition_number : float
        Ratio of the largest to the smallest singular value of B.
    exactly_identified : bool
    status, message : str
        'unidentified' with NaN premia when there are fewer independent
        assets than factors or B is ill-conditioned.
    """

    premia: np.ndarray
    premia_cov: np.ndarray
    pricing_errors: np.ndarray
    condition_number: float
    exactly_identified: bool
    status: str
    message: str


class CompleteMarketInversion:
    """``lambda = B^{-1} (mu - r)`` for a complete market, least squares beyond.

    Parameters
    ----------
    max_condition : float
        Largest accepted condition number of the (N, K) exposure matrix. The
        relative error of the premia can be this many times that of the mean
        returns, so the default 1e3 already allows a lot of amplification.
    """

    def __init__(self, *, max_condition: float = 1e3) -> None:
        if max_condition <= 1:
            raise ValueError("max_condition must exceed 1")
        self.max_condition = float(max_condition)

    def fit(self, mean_excess: Any, betas: Any, mean_cov: Any | None = None) -> InvertedPremia:
        """Solve for the premia.

        Parameters
        ----------
        mean_excess : array (N,)
            Expected (mean) excess returns ``mu - r`` of the assets.
        betas : array (N, K)
            Exposures (loadings on the shocks).
        mean_cov : array (N, N), optional
            Covariance of ``mean_excess``.
        """
        mu = np.asarray(mean_excess, dtype=float).ravel()
        b = np.asarray(betas, dtype=float)
        if b.ndim == 1:
            b = b[:, None]
        n, k = b.shape
        if mu.shape != (n,):
            raise ValueError("mean_excess and betas disagree on the number of assets")
        nan_k = np.full(k, np.nan)
        if not (np.all(np.isfinite(mu)) and np.all(np.isfinite(b))):
            return InvertedPremia(nan_k, np.full((k, k), np.nan), np.full(n, np.nan), np.nan, False,
                                  "too_little_data", "missing mean returns or exposures")
        if n < k:
            return InvertedPremia(nan_k, np.full((k, k), np.nan), np.full(n, np.nan), np.inf, False,
                                  "unidentified", f"{n} assets cannot identify {k} premia")
        sv = np.linalg.svd(b, compute_uv=False)
        cond = float(sv[0] / sv[-1]) if sv[-1] > 0 else np.inf
        if not cond <= self.max_condition:
            return InvertedPremia(
                nan_k, np.full((k, k), np.nan), np.full(n, np.nan), cond, False, "unidentified",
                f"exposure matrix condition number {cond:.3g} exceeds {self.max_condition:.3g}: "
                "the assets do not separate the factors (not independent enough)",
            )
        pinv = np.linalg.pinv(b)
        lam = pinv @ mu
        lam_cov = np.full((k, k), np.nan) if mean_cov is None else pinv @ np.asarray(mean_cov, float) @ pinv.T
        exact = n == k
        return InvertedPremia(lam, lam_cov, mu - b @ lam, cond, exact, "ok",
                              "exactly identified" if exact else f"least squares over {n} assets")


# --------------------------------------------------------------------------- #
# Linear stochastic discount factor
# --------------------------------------------------------------------------- #
@dataclass(frozen=True, eq=False)
class SDFEstimate:
    """Linear SDF of traded excess-return factors.

    Attributes
    ----------
    factors : tuple (K,)
    b : ndarray (K,)
        ``Sigma_f^{-1} mu_f`` (also the mean-variance weights up to scale).
    sdf : ndarray (T,)
        ``m_t = 1 - b'(f_t - mean f)``; NaN on rows with a missing factor.
    mean_m, sigma_m, hj_ratio : float
        Sample mean (1 by construction), standard deviation (``ddof``) and
        ``sigma_m / mean_m``, the Hansen-Jagannathan ratio.
    max_sharpe, max_sharpe_se : float
        ``sqrt(mu' Sigma^{-1} mu)`` per period and its delta-method error.
    max_sharpe_annual, max_sharpe_annual_se : float
        Times ``sqrt(periods_per_year)``.
    factor_pricing_errors : ndarray (K,)
        ``mean f - Cov(f, f) b`` (zero up to rounding).
    assets : tuple (N,)
    asset_pricing_errors, asset_pricing_error_se : ndarray (N,)
        ``E[m r_i] = mean r_i - Cov(r_i, f) b`` and its HAC standard error.
    nobs, ddof, hac_lags, periods_per_year : int
    status, message : str
    """

    factors: tuple[str, ...]
    b: np.ndarray
    sdf: np.ndarray
    mean_m: float
    sigma_m: float
    hj_ratio: float
    max_sharpe: float
    max_sharpe_se: float
    max_sharpe_annual: float
    max_sharpe_annual_se: float
    factor_pricing_errors: np.ndarray
    assets: tuple[str, ...]
    asset_pricing_errors: np.ndarray
    asset_pricing_error_se: np.ndarray
    nobs: int
    ddof: int
    hac_lags: int
    periods_per_year: int
    status: str
    message: str


class LinearSDF:
    """``m_t = 1 - b'(f_t - E f)`` with ``b = Sigma_f^{-1} mu_f`` for traded factors.

    Parameters
    ----------
    ddof : int
        Degrees of freedom of the covariance (1: sample covariance).
    hac_lags : int
        Newey-West lag for the Sharpe-ratio and pricing-error standard errors.
    periods_per_year : int
        For the annual Sharpe ratio (12 monthly, 252 daily; common practice).

    Notes
    -----
    Pricing errors use the moment form ``E[m r] = mean r - Cov(r, f) b`` with
    the same ``ddof`` as ``b``, so the factors are priced exactly for any
    ``ddof``; the plain time average of ``m_t r_t`` equals it only with
    ``ddof=0`` (with ``ddof=1`` it is larger by ``Cov(r, f) b / T``). On complete
    data ``E[m r_i]`` equals the time-series OLS alpha of asset i.

    The Sharpe-ratio error is the delta method on ``theta = mu' Sigma^{-1} mu``:
    each row contributes ``psi_t = 2 u_t - u_t^2 + theta`` with ``u_t = b'(f_t -
    mu)``; ``Var(theta) = S(psi) / T^2`` (Newey-West sum) and ``se(SR) =
    se(theta) / (2 SR)``. Under iid normal returns this is ``sqrt((1 +
    SR^2 / 2) / T)``, Lo's (2002) formula when K = 1. The sample maximal Sharpe
    ratio is biased upwards (by about K / (2 T SR) when SR is not near zero);
    the error is not reliable when SR is near zero. With only the market factor
    this is the CAPM: ``b = mu_m / sigma_m^2`` and the ratio is the market
    Sharpe ratio.
    """

    def __init__(self, *, ddof: int = 1, hac_lags: int = 0, periods_per_year: int = 12) -> None:
        self.ddof = int(ddof)
        self.hac_lags = int(hac_lags)
        self.periods_per_year = int(periods_per_year)

    def fit(self, factor_returns: Any, asset_returns: Any | None = None) -> SDFEstimate:
        """Estimate the SDF and, if assets are given, their pricing errors.

        Parameters
        ----------
        factor_returns : (T, K)
        asset_returns : (T, N), optional
        """
        if asset_returns is None:
            f, _, factors = _as_matrix(factor_returns, "factor_returns")
            y, assets = np.empty((f.shape[0], 0)), ()
        else:
            y, f, _, assets, factors = paired_panels(asset_returns, factor_returns)
        n_rows, k = f.shape
        rows = np.all(np.isfinite(f), axis=1)
        fm = f[rows]
        n_obs = fm.shape[0]
        if n_obs <= k + self.ddof:
            return self._failed(factors, assets, n_rows, n_obs, "too_little_data",
                                f"{n_obs} complete rows for {k} factors")
        mu = fm.mean(axis=0)
        sigma = np.cov(fm, rowvar=False, ddof=self.ddof).reshape(k, k)
        if np.linalg.cond(sigma) > 1e12:
            return self._failed(factors, assets, n_rows, n_obs, "unidentified",
                                "the factor covariance matrix is singular")
        b = np.linalg.solve(sigma, mu)
        sdf = np.full(n_rows, np.nan)
        sdf[rows] = 1.0 - (fm - mu) @ b
        m_ok = sdf[rows]
        mean_m = float(m_ok.mean())
        sigma_m = float(m_ok.std(ddof=self.ddof))
        theta = float(mu @ b)
        sr = float(np.sqrt(max(theta, 0.0)))
        u = (fm - mu) @ b
        psi = 2.0 * u - u * u + theta
        var_theta = float(long_run_covariance((psi - psi.mean())[:, None], self.hac_lags)[0, 0]) / n_obs**2
        sr_se = np.sqrt(var_theta) / (2.0 * sr) if sr > 0 else np.nan
        factor_err = mu - sigma @ b

        asset_err = np.full(len(assets), np.nan)
        asset_se = np.full(len(assets), np.nan)
        if len(assets):
            g = np.where(rows, np.where(rows[:, None], f, 0.0) @ b, 0.0)  # b'f_t
            ok = np.isfinite(y) & rows[:, None]
            n_i = ok.sum(axis=0)
            with np.errstate(invalid="ignore", divide="ignore"):
                mean_i = np.where(ok, y, 0.0).sum(axis=0) / n_i
                gbar_i = (ok * g[:, None]).sum(axis=0) / n_i
                cross = np.where(ok, (y - mean_i) * (g[:, None] - gbar_i), 0.0)
                asset_err = mean_i - cross.sum(axis=0) / (n_i - self.ddof)
            exp = RollingExposureModel(n_rows, min_nobs=min(n_rows, k + 3), hac_lags=self.hac_lags).fit(
                y, f, output_from=n_rows - 1)
            asset_se = exp.alpha_se[-1]
            asset_err = np.where(exp.cell_status[-1] == 0, asset_err, np.nan)
        root = np.sqrt(self.periods_per_year)
        return SDFEstimate(
            factors=factors, b=b, sdf=sdf, mean_m=mean_m, sigma_m=sigma_m, hj_ratio=sigma_m / mean_m,
            max_sharpe=sr, max_sharpe_se=float(sr_se), max_sharpe_annual=sr * root,
            max_sharpe_annual_se=float(sr_se * root), factor_pricing_errors=factor_err, assets=assets,
            asset_pricing_errors=asset_err, asset_pricing_error_se=asset_se, nobs=n_obs, ddof=self.ddof,
            hac_lags=self.hac_lags, periods_per_year=self.periods_per_year, status="ok",
            message=f"{k} factors, {n_obs} complete rows",
        )

    def _failed(self, factors, assets, n_rows, n_obs, status, message):
        k, n = len(factors), len(assets)
        return SDFEstimate(factors, np.full(k, np.nan), np.full(n_rows, np.nan), np.nan, np.nan, np.nan,
                           np.nan, np.nan, np.nan, np.nan, np.full(k, np.nan), assets, np.full(n, np.nan),
                           np.full(n, np.nan), n_obs, self.ddof, self.hac_lags, self.periods_per_year,
                           status, message)
