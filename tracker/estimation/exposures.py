"""Asset exposures to factor returns, as known at each date.

Two estimators of the loadings ``beta_{i,t}`` in

    r_{i,t} = alpha_i + beta_{i,t}' f_t + e_{i,t}

for many assets ``i = 1..N`` on the same ``K`` factor returns ``f_t``:

* :class:`RollingExposureModel` -- ordinary least squares on a trailing window
  (e.g. 756 daily rows = 3 years, or 60 months) with Newey-West (1987) HAC
  standard errors. The estimate at row ``t`` uses rows ``t - window + 1 .. t``.
* :class:`RandomWalkBetaModel` -- random-walk coefficients filtered by the
  Kalman filter, signal-to-noise ratio by maximum likelihood; ``fix`` filters
  new rows at saved parameters from a saved filter state.

All inputs are decimal excess returns. Missing asset returns are NaN; a row with
any missing factor return is unusable for every asset.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

__all__ = [
    "CELL_STATUS",
    "ExposureEstimate",
    "RandomWalkBetaEstimate",
    "RandomWalkBetaModel",
    "RandomWalkBetaParams",
    "RandomWalkBetaState",
    "RollingExposureModel",
    "default_hac_lags",
    "long_run_covariance",
    "newey_west_weights",
    "paired_panels",
]

#: Meaning of the integer codes in :attr:`ExposureEstimate.cell_status`.
CELL_STATUS = ("ok", "too_little_data", "unidentified")
_OK, _TOO_LITTLE, _UNIDENTIFIED = 0, 1, 2
# Fits with sum(y^2) / SSR above this go through the direct residual path (see _WindowMoments).
_EXPANSION_LIMIT = 1e4


# --------------------------------------------------------------------------- #
# Shared helpers (also used by tracker.estimation.pricing)
# --------------------------------------------------------------------------- #
def newey_west_weights(lags: int) -> np.ndarray:
    """Bartlett kernel weights ``w_j = 1 - j / (lags + 1)``, shape (lags + 1,)."""
    if lags < 0:
        raise ValueError("lags must be non-negative")
    return 1.0 - np.arange(lags + 1) / (lags + 1.0)


def default_hac_lags(nobs: int) -> int:
    """Newey & West (1994) rule of thumb ``floor(4 (nobs / 100) ** (2 / 9))``."""
    return int(np.floor(4.0 * (nobs / 100.0) ** (2.0 / 9.0)))


def long_run_covariance(scores: np.ndarray, lags: int, *, center: bool = False) -> np.ndarray:
    """Newey-West sum ``S = G_0 + sum_j w_j (G_j + G_j')`` with ``G_j = sum_t u_t u_{t-j}'``.

    Parameters
    ----------
    scores : ndarray, shape (T, p)
        Series ``u_t``; rows with a NaN are set to zero (they then add nothing,
        and the lag structure of the other rows is kept).
    lags : int
        Bartlett truncation lag; 0 gives the White (outer-product) sum.
    center : bool
        Subtract the column means first.

    Returns
    -------
    ndarray, shape (p, p)
        The *sum* (not the average) over t, so that ``A S A'`` is the sandwich
        covariance of an estimator ``sum_t A u_t``.
    """
    u = np.asarray(scores, dtype=float)
    if u.ndim == 1:
        u = u[:, None]
    u = np.where(np.isfinite(u), u, 0.0)
    if center:
        u = u - u.mean(axis=0)
    w = newey_west_weights(lags)
    out = u.T @ u
    for j in range(1, min(lags, u.shape[0] - 1) + 1):
        g = u[j:].T @ u[:-j]
        out += w[j] * (g + g.T)
    return out


def paired_panels(
    first: Any, second: Any, first_name: str = "asset_returns", second_name: str = "factor_returns"
) -> tuple[np.ndarray, np.ndarray, pd.Index, tuple[str, ...], tuple[str, ...]]:
    """Two return panels as float arrays paired by row.

    Rows are paired by position; if both inputs carry a non-default pandas index
    the indexes must be equal (a return must not be attached to another period).

    Returns
    -------
    a : ndarray (T, N); b : ndarray (T, K); dates : Index (T,);
    names of a's columns; names of b's columns.
    """
    a, a_idx, a_cols = _as_matrix(first, first_name)
    b, b_idx, b_cols = _as_matrix(second, second_name)
    if a.shape[0] != b.shape[0]:
        raise ValueError(f"{first_name} has {a.shape[0]} rows but {second_name} has {b.shape[0]}")
    if a_idx is not None and b_idx is not None and not a_idx.equals(b_idx):
        raise ValueError(f"{first_name} and {second_name} have different row indexes")
    dates = a_idx if a_idx is not None else (b_idx if b_idx is not None else pd.RangeIndex(a.shape[0]))
    return a, b, dates, a_cols, b_cols


def _as_matrix(data: Any, name: str) -> tuple[np.ndarray, pd.Index | None, tuple[str, ...]]:
    if isinstance(data, pd.Series):
        data = data.to_frame()
    if isinstance(data, pd.DataFrame):
        values = data.to_numpy(dtype=float, na_value=np.nan)
        index = None if isinstance(data.index, pd.RangeIndex) else data.index
        return values, index, tuple(str(c) for c in data.columns)
    values = np.asarray(data, dtype=float)
    if values.ndim == 1:
        values = values[:, None]
    if values.ndim != 2:
        raise ValueError(f"{name} must be 1-D or 2-D, got shape {values.shape}")
    prefix = "f" if "factor" in name else "a"
    return values, None, tuple(f"{prefix}{j}" for j in range(values.shape[1]))


def _overall_status(codes: np.ndarray) -> tuple[str, str]:
    n_ok = int(np.sum(codes == _OK))
    if n_ok == 0:
        if np.any(codes == _UNIDENTIFIED):
            return "unidentified", "the factor returns are collinear in every window with enough data"
        return "too_little_data", "no window holds enough observations for an estimate"
    n_short = int(np.sum(codes == _TOO_LITTLE))
    n_unid = int(np.sum(codes == _UNIDENTIFIED))
    parts = [f"{n_ok} of {codes.size} asset-dates estimated"]
    if n_short:
        parts.append(f"{n_short} with too little data")
    if n_unid:
        parts.append(f"{n_unid} with collinear factors (unidentified)")
    return "ok", "; ".join(parts)


# --------------------------------------------------------------------------- #
# Rolling OLS with Newey-West standard errors
# --------------------------------------------------------------------------- #
@dataclass(frozen=True, eq=False)
class ExposureEstimate:
    """Rolling-window exposures, one estimate per (output date, asset).

    Symbols: T_out output dates, N assets, K factors. NaN where
    ``cell_status != 0``.

    Attributes
    ----------
    dates : Index (T_out,)
    assets : tuple of str (N,)
    factors : tuple of str (K,)
    alpha, alpha_se : ndarray (T_out, N)
        Intercept per period and its HAC standard error.
    betas, se : ndarray (T_out, N, K)
        Slopes on the factors and their HAC standard errors.
    r2 : ndarray (T_out, N)
        Centred R-squared in the window.
    resid_var : ndarray (T_out, N)
        Residual variance ``SSR / (nobs - K - 1)``.
    nobs : ndarray of int (T_out, N)
        Usable rows in the window.
    beta_cov_last : ndarray (N, K, K)
        HAC covariance of the slopes at the last output date.
    beta_cov : ndarray (T_out, N, K, K) or None
        All slope covariances, only when the model keeps them.
    cell_status : ndarray of int8 (T_out, N)
        Codes into :data:`CELL_STATUS` ('ok', 'too_little_data', 'unidentified').
    window, hac_lags : int
    status, message : str
        'ok' when at least one cell is estimated.
    """

    dates: pd.Index
    assets: tuple[str, ...]
    factors: tuple[str, ...]
    alpha: np.ndarray
    alpha_se: np.ndarray
    betas: np.ndarray
    se: np.ndarray
    r2: np.ndarray
    resid_var: np.ndarray
    nobs: np.ndarray
    beta_cov_last: np.ndarray
    beta_cov: np.ndarray | None
    cell_status: np.ndarray
    window: int
    hac_lags: int
    status: str
    message: str

    def status_of(self, date_pos: int, asset_pos: int) -> str:
        """Plain status word of one cell."""
        return CELL_STATUS[int(self.cell_status[date_pos, asset_pos])]


class RollingExposureModel:
    """Trailing-window OLS exposures with Newey-West (Bartlett) HAC errors.

    Parameters
    ----------
    window : int
        Rows per window (e.g. 756 daily, 60 monthly).
    min_nobs : int, optional
        Fewest usable rows for an estimate; default ``window`` (no estimate
        until a full window exists). With fewer rows than ``window`` available
        at the start, an expanding window is used once ``min_nobs`` is reached.
    hac_lags : int, optional
        Bartlett truncation lag; default :func:`default_hac_lags` of ``window``.
    small_sample_correction : bool
        Multiply the covariance by ``n / (n - K - 1)``. Default False, as in
        statsmodels ``OLS.fit(cov_type='HAC')``.
    keep_all_covariances : bool
        Keep the (T_out, N, K, K) slope covariances (memory: 8 T N K^2 bytes).
    max_condition : float
        Largest accepted condition number of the column-equilibrated ``X'X``;
        above it the cell is 'unidentified'.

    Notes
    -----
    The slopes come from the normal equations of each window (equilibrated
    to keep the constant and the small factor returns on one scale). The
    Newey-West middle matrix ``sum_j w_j sum_s x_s x_{s-j}' e_s e_{s-j}`` is
    expanded in the window's coefficients and kept as sliding sums over rows
    (:class:`_WindowMoments`), so a date costs about ``4 (hac_lags + 1) N
    (K + 1)^3`` operations, independent of the window length. Assets with a
    missing return in the window, and near-exact fits (where the expansion
    would lose digits), are recomputed from their residuals
    (:func:`_direct_cells`); a missing return gets a zero residual in place,
    so the lag structure of the other rows is kept. statsmodels
    ``OLS(cov_type='HAC')`` is the reference twin in the tests.
    """

    def __init__(
        self,
        window: int,
        *,
        min_nobs: int | None = None,
        hac_lags: int | None = None,
        small_sample_correction: bool = False,
        keep_all_covariances: bool = False,
        max_condition: float = 1e10,
    ) -> None:
        if int(window) != window or window < 3:
            raise ValueError("window must be an integer >= 3")
        self.window = int(window)
        self.min_nobs = self.window if min_nobs is None else int(min_nobs)
        if not 2 <= self.min_nobs <= self.window:
            raise ValueError("min_nobs must be in [2, window]")
        self.hac_lags = default_hac_lags(self.window) if hac_lags is None else int(hac_lags)
        if self.hac_lags < 0:
            raise ValueError("hac_lags must be >= 0")
        self.small_sample_correction = bool(small_sample_correction)
        self.keep_all_covariances = bool(keep_all_covariances)
        self.max_condition = float(max_condition)

    def to_dict(self) -> dict[str, Any]:
        """Settings as a JSON-able dict."""
        return {
            "window": self.window,
            "min_nobs": self.min_nobs,
            "hac_lags": self.hac_lags,
            "small_sample_correction": self.small_sample_correction,
            "keep_all_covariances": self.keep_all_covariances,
            "max_condition": self.max_condition,
        }

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> RollingExposureModel:
        """Inverse of :meth:`to_dict`."""
        data = dict(data)
        return cls(data.pop("window"), **data)

    def fit(self, asset_returns: Any, factor_returns: Any, *, output_from: int = 0) -> ExposureEstimate:
        """Estimate exposures at rows ``output_from .. T-1``.

        Parameters
        ----------
        asset_returns : DataFrame or ndarray, shape (T, N)
        factor_returns : DataFrame or ndarray, shape (T, K)
        output_from : int
            First row to estimate. To update only new rows pass the last
            ``window - 1`` old rows plus the new ones and ``output_from =
            window - 1``: the cost is proportional to the new rows.

        Returns
        -------
        ExposureEstimate
        """
        y, f, dates, assets, factors = paired_panels(asset_returns, factor_returns)
        n_rows, n_assets = y.shape
        k = f.shape[1]
        p = k + 1
        if not 0 <= output_from < n_rows:
            raise ValueError("output_from must be a row position of the data")
        min_nobs = max(self.min_nobs, p + 1)

        row_ok = np.all(np.isfinite(f), axis=1)
        # A row with a missing factor return is zero in x, so it adds nothing anywhere.
        x = np.column_stack([np.ones(n_rows), np.where(row_ok[:, None], f, 0.0)])
        x[~row_ok] = 0.0
        valid = np.isfinite(y) & row_ok[:, None]
        yz = np.where(valid, y, 0.0)
        lags = self.hac_lags
        weights = newey_west_weights(lags)
        lag_prod = _lagged_products(x, lags)
        cum_valid = np.vstack([np.zeros((1, n_assets), dtype=np.int64), np.cumsum(valid, axis=0)])
        cum_rows = np.concatenate([[0], np.cumsum(row_ok)])

        n_out = n_rows - output_from
        alpha = np.full((n_out, n_assets), np.nan)
        alpha_se = np.full((n_out, n_assets), np.nan)
        betas = np.full((n_out, n_assets, k), np.nan)
        se = np.full((n_out, n_assets, k), np.nan)
        r2 = np.full((n_out, n_assets), np.nan)
        resid_var = np.full((n_out, n_assets), np.nan)
        nobs = np.zeros((n_out, n_assets), dtype=np.int64)
        codes = np.full((n_out, n_assets), _TOO_LITTLE, dtype=np.int8)
        cov_all = np.full((n_out, n_assets, k, k), np.nan) if self.keep_all_covariances else None
        cov_last = np.full((n_assets, k, k), np.nan)

        first = max(0, output_from - self.window + 1)
        # A few output rows (a day's update): each from its own window's residuals
        # (_direct_cells, about 2 W N p^2 (L+1) operations a row) rather than sliding sums,
        # whose warm-up over the window alone costs about 4 W N p^3 (L+1). Measured with
        # 500 assets, 12 factors, a 756-row window: one new row 2.0 s -> 0.1 s.
        moments = None if n_out <= p else _WindowMoments(x, yz, lag_prod, weights, first)
        for t in range(first if moments is not None else output_from, n_rows):
            a = max(0, t - self.window + 1)
            if moments is not None:
                moments.slide(t, a)
            if t < output_from:
                continue
            o = t - output_from
            n_i = cum_valid[t + 1] - cum_valid[a]
            nobs[o] = n_i
            enough = n_i >= min_nobs
            if not enough.any():
                continue
            # without sliding sums every asset goes through its own window (_direct_cells)
            complete = (enough & (n_i == cum_rows[t + 1] - cum_rows[a]) if moments is not None
                        else np.zeros_like(enough))
            partial = enough & ~complete
            cells = []
            direct = partial
            if complete.any():
                idx = np.flatnonzero(complete)
                coef, cov, ssr, sst, ok = moments.cells(complete, x[a : t + 1], self.max_condition)
                # The expansion loses about log10(sum y^2 / SSR) digits; near-exact fits are
                # recomputed from their residuals.
                sharp = ok & (moments.yy[complete] > _EXPANSION_LIMIT * ssr)
                if sharp.any():
                    direct = partial.copy()
                    direct[idx[sharp]] = True
                    keep = ~sharp
                    idx, coef, cov, ssr, sst, ok = idx[keep], coef[keep], cov[keep], ssr[keep], sst[keep], ok[keep]
                cells.append((idx, coef, cov, ssr, sst, ok))
            if direct.any():
                cells.append((np.flatnonzero(direct), *_direct_cells(
                    x[a : t + 1], yz[a : t + 1][:, direct], valid[a : t + 1][:, direct],
                    [lp[a : t + 1] for lp in lag_prod], weights, self.max_condition)))
            for idx, coef, cov, ssr, sst, ok in cells:
                n_sel = n_i[idx]
                if self.small_sample_correction:
                    cov = cov * (n_sel / (n_sel - p))[:, None, None]
                good, bad = idx[ok], idx[~ok]
                codes[o, good] = _OK
                codes[o, bad] = _UNIDENTIFIED
                # Rounding in the expanded middle matrix can leave -1e-20 for exact fits.
                var_diag = np.maximum(np.diagonal(cov, axis1=1, axis2=2)[ok], 0.0)
                alpha[o, good] = coef[ok, 0]
                betas[o, good] = coef[ok, 1:]
                alpha_se[o, good] = np.sqrt(var_diag[:, 0])
                se[o, good] = np.sqrt(var_diag[:, 1:])
                with np.errstate(divide="ignore", invalid="ignore"):
                    r2[o, good] = 1.0 - ssr[ok] / sst[ok]
                    resid_var[o, good] = ssr[ok] / (n_sel[ok] - p)
                slope_cov = cov[ok][:, 1:, 1:]
                if cov_all is not None:
                    cov_all[o, good] = slope_cov
                if o == n_out - 1:
                    cov_last[good] = slope_cov

        status, message = _overall_status(codes)
        return ExposureEstimate(
            dates=dates[output_from:],
            assets=assets,
            factors=factors,
            alpha=alpha,
            alpha_se=alpha_se,
            betas=betas,
            se=se,
            r2=r2,
            resid_var=resid_var,
            nobs=nobs,
            beta_cov_last=cov_last,
            beta_cov=cov_all,
            cell_status=codes,
            window=self.window,
            hac_lags=lags,
            status=status,
            message=message,
        )


def _lagged_products(x: np.ndarray, lags: int) -> list[np.ndarray]:
    """Row products ``u_j(s) = vec(x_s x_{s-j}')`` (index a * p + b), zero for s < j.

    Returns a list of ``lags + 1`` arrays of shape (T, p^2).
    """
    n_rows, p = x.shape
    out = [np.einsum("sa,sb->sab", x, x).reshape(n_rows, p * p)]
    for j in range(1, lags + 1):
        lp = np.zeros((n_rows, p * p))
        if j < n_rows:
            lp[j:] = np.einsum("sa,sb->sab", x[j:], x[:-j]).reshape(-1, p * p)
        out.append(lp)
    return out


class _WindowMoments:
    """Sliding-window sums from which the OLS fit and the Newey-West middle matrix follow.

    With ``e_s = y_s - x_s' b`` the lag-j middle term
    ``M_j = sum_s x_s x_{s-j}' e_s e_{s-j}`` expands into
    ``D_j - B_j . b + A_j . (b, b)``, where the sums
    ``D_j = sum u_j(s) y_s y_{s-j}`` (p^2 per asset),
    ``B_j = sum u_j(s) (x) (y_s x_{s-j} + y_{s-j} x_s)`` (p^3 per asset) and
    ``A_j = sum u_j(s) u_j(s)'`` (p^4, shared) do not depend on b. Kept as
    running sums, a date costs about ``4 (lags + 1) N p^3`` operations instead
    of ``(lags + 1) window N p^2`` for recomputing the residuals of each window.
    The expansion is exact only for assets observed on every usable row of the
    window; other assets go through :func:`_direct_cells`.
    """

    def __init__(self, x, yz, lag_prod, weights, first_row):
        n_assets = yz.shape[1]
        p = x.shape[1]
        self.x, self.yz, self.lag_prod = x, yz, lag_prod
        self.lags = len(weights) - 1
        # Half weight at lag 0: the middle matrix is S + S' with S = sum_j omega_j M_j.
        self.omega = weights.copy()
        self.omega[0] = 0.5
        self.first_row = first_row
        self.p = p
        self.d = np.zeros((n_assets, p * p))
        self.b = np.zeros((n_assets, p * p * p))
        self.a = np.zeros((p * p, p * p))
        self.xy = np.zeros((n_assets, p))
        self.yy = np.zeros(n_assets)
        self.ysum = np.zeros(n_assets)

    def slide(self, t: int, a: int) -> None:
        """Move the window to rows ``a .. t``: drop row ``t - window`` if held, add row t."""
        hi, lo, sign = [], [], []
        leaving = a - 1
        if leaving >= self.first_row:
            # Pairs (leaving + j, leaving) were added when row leaving + j entered.
            for j in range(0, min(self.lags, t - 1 - leaving) + 1):
                hi.append(leaving + j)
                lo.append(leaving)
                sign.append(-self.omega[j])
            self._row(leaving, -1.0)
        start = max(a, self.first_row)
        for j in range(0, min(self.lags, t - start) + 1):
            hi.append(t)
            lo.append(t - j)
            sign.append(self.omega[j])
        self._row(t, 1.0)
        hi_a, lo_a, w = np.array(hi), np.array(lo), np.array(sign)
        lag = hi_a - lo_a
        u = np.stack([self.lag_prod[j][s] for j, s in zip(lag, hi_a)])  # (P, p^2)
        y_hi, y_lo = self.yz[hi_a], self.yz[lo_a]  # (P, N)
        self.d += (w[:, None] * y_hi * y_lo).T @ u
        vb = np.concatenate([
            (u[:, :, None] * self.x[lo_a][:, None, :]).reshape(len(w), -1),
            (u[:, :, None] * self.x[hi_a][:, None, :]).reshape(len(w), -1),
        ])
        coef = np.concatenate([w[:, None] * y_hi, w[:, None] * y_lo])
        self.b += coef.T @ vb
        self.a += (w[:, None] * u).T @ u

    def _row(self, s: int, sign: float) -> None:
        ys = self.yz[s]
        self.xy += sign * ys[:, None] * self.x[s][None, :]
        self.yy += sign * ys * ys
        self.ysum += sign * ys

    def cells(self, sel: np.ndarray, xw: np.ndarray, max_condition: float):
        """Coefficients, HAC covariances, SSR, SST and identification of assets ``sel``."""
        p = self.p
        n = int(np.sum(sel))
        xtx = xw.T @ xw
        coef, inv, ok = _solve_equilibrated(xtx[None], self.xy[sel], max_condition, shared=True)
        bb = (coef[:, :, None] * coef[:, None, :]).reshape(n, p * p)
        half = (self.d[sel]
                - np.einsum("nqc,nc->nq", self.b[sel].reshape(n, p * p, p), coef)
                + bb @ self.a.T).reshape(n, p, p)
        meat = half + half.transpose(0, 2, 1)
        cov = inv @ meat @ inv
        n_obs = xtx[0, 0]
        fitted = np.einsum("na,na->n", coef, self.xy[sel])
        ssr = self.yy[sel] - 2.0 * fitted + np.einsum("na,ab,nb->n", coef, xtx, coef)
        ybar = self.ysum[sel] / n_obs
        sst = self.yy[sel] - n_obs * ybar**2
        return coef, cov, ssr, sst, ok


def _direct_cells(xw, yw, mw, lag_w, weights, max_condition):
    """Assets with missing rows in the window: own X'X, residuals recomputed.

    Parameters
    ----------
    xw : (W, p); yw : (W, n) zero-filled; mw : (W, n) bool; lag_w : list of (W, p^2).
    """
    n_w, p = xw.shape
    xtx = (mw.T.astype(float) @ lag_w[0]).reshape(-1, p, p)
    xty = (xw.T @ yw).T
    coef, inv, ok = _solve_equilibrated(xtx, xty, max_condition)
    resid = (yw - xw @ coef.T) * mw
    meat = (lag_w[0].T @ (resid * resid)).reshape(p, p, -1)
    for j in range(1, min(len(weights) - 1, n_w - 1) + 1):
        g = (lag_w[j][j:].T @ (resid[j:] * resid[:-j])).reshape(p, p, -1)
        meat += weights[j] * (g + g.transpose(1, 0, 2))
    cov = inv @ meat.transpose(2, 0, 1) @ inv
    n_sel = mw.sum(axis=0)
    ssr = np.sum(resid * resid, axis=0)
    ybar = yw.sum(axis=0) / n_sel
    sst = np.sum(yw * yw, axis=0) - n_sel * ybar**2
    return coef, cov, ssr, sst, ok

def _solve_equilibrated(
    xtx: np.ndarray, xty: np.ndarray, max_condition: float, *, shared: bool = False
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Solve stacked normal equations after scaling to unit diagonal.

    Parameters
    ----------
    xtx : ndarray (n, p, p), or (1, p, p) with ``shared`` (one X'X for all)
    xty : ndarray (n, p)
    max_condition : float

    Returns
    -------
    coef : ndarray (n, p); inverse of X'X : ndarray (n, p, p);
    ok : bool ndarray (n,), False where the scaled matrix is too ill-conditioned.
    Unidentified rows carry zeros so that later algebra stays finite.
    """
    n, p = xty.shape
    diag = np.diagonal(xtx, axis1=1, axis2=2)
    ok = np.all(diag > 0, axis=1)
    d = 1.0 / np.sqrt(np.where(diag > 0, diag, 1.0))
    scaled = xtx * d[:, :, None] * d[:, None, :]
    cond = np.full(xtx.shape[0], np.inf)
    if ok.any():
        cond[ok] = np.linalg.cond(scaled[ok])
    ok &= np.isfinite(cond) & (cond <= max_condition)
    inv = np.zeros(xtx.shape)
    if ok.any():
        inv[ok] = np.linalg.inv(scaled[ok]) * d[ok][:, :, None] * d[ok][:, None, :]
    if shared:
        inv = np.broadcast_to(inv, (n, p, p))
        ok = np.broadcast_to(ok, (n,)).copy()
    coef = np.einsum("nab,nb->na", inv, xty)
    return coef, inv, ok


# --------------------------------------------------------------------------- #
# Random-walk betas (Kalman filter)
# --------------------------------------------------------------------------- #
@dataclass(frozen=True, eq=False)
class RandomWalkBetaParams:
    """Parameters of ``r_t = x_t' c_t + e_t``, ``c_t = c_{t-1} + w_t`` per asset.

    ``x_t = (1, f_t')``; ``e_t ~ N(0, obs_var)``; ``w_t ~ N(0, state_var * D)``
    with ``D = diag(intercept_varies, 1, ..., 1)``.

    Attributes
    ----------
    obs_var, state_var : ndarray (N,)
        Per-period variances (state_var in beta units squared per period).
    intercept_varies : bool
    assets, factors : tuple of str
    """

    obs_var: np.ndarray
    state_var: np.ndarray
    intercept_varies: bool
    assets: tuple[str, ...]
    factors: tuple[str, ...]

    def to_dict(self) -> dict[str, Any]:
        """JSON-able dict."""
        return {
            "obs_var": [float(v) for v in self.obs_var],
            "state_var": [float(v) for v in self.state_var],
            "intercept_varies": self.intercept_varies,
            "assets": list(self.assets),
            "factors": list(self.factors),
        }

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> RandomWalkBetaParams:
        """Inverse of :meth:`to_dict`."""
        return cls(
            obs_var=np.asarray(data["obs_var"], dtype=float),
            state_var=np.asarray(data["state_var"], dtype=float),
            intercept_varies=bool(data["intercept_varies"]),
            assets=tuple(data["assets"]),
            factors=tuple(data["factors"]),
        )


@dataclass(frozen=True, eq=False)
class RandomWalkBetaState:
    """Filtered state after the last row: enough to resume filtering.

    Attributes
    ----------
    coef : ndarray (N, K + 1)
        ``c_{t|t}`` = (alpha, beta_1..beta_K); NaN rows for assets not started.
    coef_cov : ndarray (N, K + 1, K + 1)
        ``P_{t|t}`` in absolute units.
    nobs : ndarray of int (N,)
        Observations absorbed so far (including the initialisation rows).
    """

    coef: np.ndarray
    coef_cov: np.ndarray
    nobs: np.ndarray

    def to_dict(self) -> dict[str, Any]:
        """JSON-able dict (NaN written as None)."""
        def clean(a: np.ndarray) -> list[Any]:
            return np.where(np.isfinite(a), a, None).tolist()

        return {"coef": clean(self.coef), "coef_cov": clean(self.coef_cov), "nobs": self.nobs.tolist()}

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> RandomWalkBetaState:
        """Inverse of :meth:`to_dict`."""
        def load(v: Any) -> np.ndarray:
            return np.array(v, dtype=object).astype(float)

        return cls(coef=load(data["coef"]), coef_cov=load(data["coef_cov"]),
                   nobs=np.asarray(data["nobs"], dtype=np.int64))


@dataclass(frozen=True, eq=False)
class RandomWalkBetaEstimate:
    """Filtered (real-time) random-walk exposures.

    Attributes
    ----------
    dates : Index (T,); assets : tuple (N,); factors : tuple (K,)
    alpha, alpha_se : ndarray (T, N)
        Filtered intercept ``c_{0,t|t}`` and its standard error.
    betas, se : ndarray (T, N, K)
        Filtered slopes ``beta_{t|t}`` (data to t only) and standard errors.
    params : RandomWalkBetaParams
    state : RandomWalkBetaState
        Filter state after the last row.
    loglike : ndarray (N,)
        Gaussian log-likelihood of the filtered rows (after initialisation).
    nobs : ndarray of int (N,)
        Rows in the likelihood.
    at_bound : ndarray of bool (N,)
        True where the fitted signal-to-noise ratio sits on a search bound.
    asset_status : tuple of str (N,)
    status, message : str
    """

    dates: pd.Index
    assets: tuple[str, ...]
    factors: tuple[str, ...]
    alpha: np.ndarray
    alpha_se: np.ndarray
    betas: np.ndarray
    se: np.ndarray
    params: RandomWalkBetaParams
    state: RandomWalkBetaState
    loglike: np.ndarray
    nobs: np.ndarray
    at_bound: np.ndarray
    asset_status: tuple[str, ...]
    status: str
    message: str


@dataclass
class _FilterOut:
    coef: np.ndarray
    var: np.ndarray
    sum_log_f: np.ndarray
    sum_v2_f: np.ndarray
    n: np.ndarray
    final_coef: np.ndarray
    final_cov: np.ndarray


class RandomWalkBetaModel:
    """Random-walk (time-varying) exposures by the Kalman filter.

    Model per asset, with ``x_t = (1, f_t')`` and ``c_t = (alpha_t, beta_t')``::

        r_t = x_t' c_t + e_t,      e_t ~ N(0, s2)
        c_t = c_{t-1} + w_t,       w_t ~ N(0, q D),  D = diag(intercept_varies, 1..1)

    Parameters
    ----------
    init_obs : int, optional
        The filter starts from OLS on each asset's first ``init_obs`` usable
        rows (prior mean = OLS coefficients, prior covariance =
        ``s2 (X'X)^{-1}``); the likelihood uses the rows after them. At q = 0
        this is exactly recursive least squares. Default ``max(5 (K + 1), 20)``.
    intercept_varies : bool
        Let the intercept drift too (default False: constant alpha).
    ratio_bounds : (float, float)
        Search range of the signal-to-noise ratio ``q / s2``; ``q = 0`` is
        always compared as well.
    ratio_tol : float
        Golden-section tolerance on ``log10(q / s2)``.

    Notes
    -----
    ``s2`` is concentrated out of the likelihood (all variances scale with it),
    leaving one ratio per asset, searched for all assets at once.
    """

    def __init__(
        self,
        *,
        init_obs: int | None = None,
        intercept_varies: bool = False,
        ratio_bounds: tuple[float, float] = (1e-7, 10.0),
        ratio_tol: float = 5e-3,
    ) -> None:
        self.init_obs = None if init_obs is None else int(init_obs)
        self.intercept_varies = bool(intercept_varies)
        lo, hi = float(ratio_bounds[0]), float(ratio_bounds[1])
        if not 0 < lo < hi:
            raise ValueError("ratio_bounds must satisfy 0 < low < high")
        self.ratio_bounds = (lo, hi)
        self.ratio_tol = float(ratio_tol)

    def to_dict(self) -> dict[str, Any]:
        """Settings as a JSON-able dict."""
        return {
            "init_obs": self.init_obs,
            "intercept_varies": self.intercept_varies,
            "ratio_bounds": list(self.ratio_bounds),
            "ratio_tol": self.ratio_tol,
        }

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> RandomWalkBetaModel:
        """Inverse of :meth:`to_dict`."""
        d = dict(data)
        d["ratio_bounds"] = tuple(d["ratio_bounds"])
        return cls(**d)

    # -- public paths ------------------------------------------------------ #
    def fit(self, asset_returns: Any, factor_returns: Any) -> RandomWalkBetaEstimate:
        """Maximum-likelihood ratio per asset, then the filtered path.

        Parameters
        ----------
        asset_returns : (T, N); factor_returns : (T, K)
        """
        y, x, valid, dates, assets, factors = self._prepare(asset_returns, factor_returns)
        n_assets, p = y.shape[1], x.shape[1]
        init_obs = self._init_obs(p)
        coef0, cov0, start, n_init = _ols_start(y, x, valid, init_obs)
        started = start < y.shape[0]
        vary = self._vary(p)

        def conc_ll(log_ratio: np.ndarray) -> np.ndarray:
            out = _filter(y, x, valid, coef0, cov0, 10.0**log_ratio, vary, start, store=False)
            return _concentrated_ll(out)

        lo, hi = np.log10(self.ratio_bounds[0]), np.log10(self.ratio_bounds[1])
        best = _golden_max(conc_ll, np.full(n_assets, lo), np.full(n_assets, hi), self.ratio_tol)
        ratio = 10.0**best
        ll_best = conc_ll(best)
        ll_zero = _concentrated_ll(_filter(y, x, valid, coef0, cov0, np.zeros(n_assets), vary, start, store=False))
        take_zero = ll_zero >= ll_best
        ratio = np.where(take_zero, 0.0, ratio)
        at_bound = (~take_zero) & ((best <= lo + 2 * self.ratio_tol) | (best >= hi - 2 * self.ratio_tol))

        out = _filter(y, x, valid, coef0, cov0, ratio, vary, start, store=True)
        with np.errstate(divide="ignore", invalid="ignore"):
            s2 = out.sum_v2_f / out.n
        enough = started & (out.n > 0) & np.isfinite(s2) & (s2 > 0)
        s2 = np.where(enough, s2, np.nan)
        params = RandomWalkBetaParams(
            obs_var=s2, state_var=ratio * s2, intercept_varies=self.intercept_varies,
            assets=assets, factors=factors,
        )
        loglike = _gaussian_ll(out, s2)
        return self._result(out, s2, params, n_init, enough, at_bound & enough, loglike, dates, assets, factors)

    def fix(
        self,
        asset_returns: Any,
        factor_returns: Any,
        params: RandomWalkBetaParams,
        state: RandomWalkBetaState | None = None,
    ) -> RandomWalkBetaEstimate:
        """Filter rows at given parameters (no estimation).

        Parameters
        ----------
        asset_returns : (T_new, N); factor_returns : (T_new, K)
        params : RandomWalkBetaParams
        state : RandomWalkBetaState, optional
            Saved state after the previous row; filtering resumes from it and
            costs time proportional to the new rows. Without it (or for assets
            whose saved state is empty) the filter starts from OLS on the first
            ``init_obs`` rows as in :meth:`fit`. Assets whose parameters are
            NaN (not estimable at the last fit) stay 'too_little_data'.
        """
        y, x, valid, dates, assets, factors = self._prepare(asset_returns, factor_returns)
        n_rows, n_assets = y.shape
        p = x.shape[1]
        if params.obs_var.shape != (n_assets,):
            raise ValueError("params do not match the number of assets")
        if bool(params.intercept_varies) != self.intercept_varies:
            raise ValueError("params.intercept_varies differs from the model setting")
        s2 = np.asarray(params.obs_var, dtype=float)
        with np.errstate(divide="ignore", invalid="ignore"):
            ratio = np.where(s2 > 0, params.state_var / s2, np.nan)
        vary = self._vary(p)
        if state is None:
            coef0, cov0, start, n_init = _ols_start(y, x, valid, self._init_obs(p))
        else:
            if state.coef.shape != (n_assets, p):
                raise ValueError("state does not match the assets and factors")
            coef0 = state.coef.copy()
            cov0 = state.coef_cov / s2[:, None, None]
            has_state = np.all(np.isfinite(coef0), axis=1)
            start = np.where(has_state, 0, n_rows)
            n_init = state.nobs.copy()
            if not has_state.all():
                # Assets without a saved state (e.g. too short before) start from OLS on
                # their first init_obs new rows, as in a fresh filter.
                new = np.flatnonzero(~has_state)
                c_new, p_new, s_new, n_new = _ols_start(y[:, new], x, valid[:, new], self._init_obs(p))
                coef0[new], cov0[new], start[new], n_init[new] = c_new, p_new, s_new, n_new
        usable = np.isfinite(ratio) & np.all(np.isfinite(coef0), axis=1) & (start < n_rows)
        ratio_f = np.where(usable, ratio, 0.0)
        start = np.where(usable, start, n_rows)
        coef0 = np.where(usable[:, None], coef0, 0.0)
        cov0 = np.where(usable[:, None, None], cov0, 0.0)
        out = _filter(y, x, valid, coef0, cov0, ratio_f, vary, start, store=True)
        s2u = np.where(usable, s2, np.nan)
        loglike = _gaussian_ll(out, s2u)
        return self._result(out, s2u, params, n_init, usable, np.zeros(n_assets, bool), loglike,
                            dates, assets, factors)

    # -- internals ------------------------------------------------------- #
    def _init_obs(self, p: int) -> int:
        init = max(5 * p, 20) if self.init_obs is None else self.init_obs
        if init < p + 1:
            raise ValueError("init_obs must exceed the number of coefficients")
        return init

    def _vary(self, p: int) -> np.ndarray:
        vary = np.ones(p)
        vary[0] = 1.0 if self.intercept_varies else 0.0
        return vary

    @staticmethod
    def _prepare(asset_returns: Any, factor_returns: Any):
        y, f, dates, assets, factors = paired_panels(asset_returns, factor_returns)
        row_ok = np.all(np.isfinite(f), axis=1)
        x = np.column_stack([np.ones(len(f)), np.where(row_ok[:, None], f, 0.0)])
        valid = np.isfinite(y) & row_ok[:, None]
        return np.where(valid, y, 0.0), x, valid, dates, assets, factors

    @staticmethod
    def _result(out, s2, params, n_init, usable, at_bound, loglike, dates, assets, factors):
        scale = s2[None, :, None]
        coef = np.where(usable[None, :, None], out.coef, np.nan)
        var = np.where(usable[None, :, None], out.var * scale, np.nan)
        sd = np.sqrt(var)
        final_cov = np.where(usable[:, None, None], out.final_cov * s2[:, None, None], np.nan)
        final_coef = np.where(usable[:, None], out.final_coef, np.nan)
        state = RandomWalkBetaState(coef=final_coef, coef_cov=final_cov,
                                    nobs=(np.asarray(n_init) + out.n.astype(np.int64)))
        asset_status = tuple("ok" if u else "too_little_data" for u in usable)
        n_ok = int(np.sum(usable))
        if n_ok == 0:
            status, message = "too_little_data", "no asset has enough rows to start the filter"
        else:
            status = "ok"
            message = f"{n_ok} of {len(usable)} assets filtered"
            if np.any(at_bound):
                message += f"; {int(np.sum(at_bound))} with the signal-to-noise ratio on a search bound"
        return RandomWalkBetaEstimate(
            dates=dates, assets=assets, factors=factors,
            alpha=coef[:, :, 0], alpha_se=sd[:, :, 0], betas=coef[:, :, 1:], se=sd[:, :, 1:],
            params=params, state=state, loglike=np.where(usable, loglike, np.nan),
            nobs=out.n.astype(np.int64), at_bound=at_bound, asset_status=asset_status,
            status=status, message=message,
        )


def _ols_start(y, x, valid, init_obs):
    """OLS on each asset's first ``init_obs`` usable rows.

    Returns coef0 (N, p), scaled covariance (X'X)^{-1} (N, p, p), start row (N,)
    (first row to filter; T when the asset never starts) and the rows used (N,).
    """
    n_rows, n_assets = y.shape
    p = x.shape[1]
    coef0 = np.zeros((n_assets, p))
    cov0 = np.zeros((n_assets, p, p))
    start = np.full(n_assets, n_rows, dtype=np.int64)
    n_init = np.zeros(n_assets, dtype=np.int64)
    counts = np.cumsum(valid, axis=0)
    for i in range(n_assets):
        hit = np.flatnonzero(counts[:, i] == init_obs)
        if hit.size == 0:
            continue
        last = hit[0]
        rows = np.flatnonzero(valid[: last + 1, i])
        xi, yi = x[rows], y[rows, i]
        xtx = xi.T @ xi
        if np.linalg.cond(xtx) > 1e12:
            continue
        inv = np.linalg.inv(xtx)
        coef0[i] = inv @ (xi.T @ yi)
        cov0[i] = inv
        start[i] = last + 1
        n_init[i] = rows.size
    return coef0, cov0, start, n_init


def _filter(y, x, valid, coef0, cov0, ratio, vary, start, *, store):
    """Kalman filter for all assets at once, in units of the observation variance.

    Parameters
    ----------
    y : (T, N) zero-filled; x : (T, p); valid : (T, N) bool;
    coef0 : (N, p); cov0 : (N, p, p) = P_0 / s2; ratio : (N,) = q / s2;
    vary : (p,) 0/1 which coefficients drift; start : (N,) first row filtered.

    Returns
    -------
    _FilterOut with per-row filtered coefficients and scaled variances (T, N, p)
    when ``store``; sums of log F* and v^2 / F* for the likelihood.
    """
    n_rows, n_assets = y.shape
    p = x.shape[1]
    coef = coef0.copy()
    cov = cov0.copy()
    q = ratio[:, None] * vary[None, :]
    diag = np.arange(p)
    sum_log_f = np.zeros(n_assets)
    sum_v2_f = np.zeros(n_assets)
    n = np.zeros(n_assets)
    out_coef = np.full((n_rows, n_assets, p), np.nan) if store else None
    out_var = np.full((n_rows, n_assets, p), np.nan) if store else None
    if store:
        # The OLS start is itself a real-time estimate at the row before the first filtered row.
        for i in np.flatnonzero((start > 0) & (start < n_rows)):
            out_coef[start[i] - 1, i] = coef[i]
            out_var[start[i] - 1, i] = np.diagonal(cov[i])
    first = int(start.min()) if n_assets else n_rows
    for t in range(first, n_rows):
        active = start <= t
        cov[:, diag, diag] += q * active[:, None]
        obs = (valid[t] & active).astype(float)
        xt = x[t]
        px = cov @ xt
        f_star = px @ xt + 1.0
        v = y[t] - coef @ xt
        gain = px / f_star[:, None]
        coef += gain * (v * obs)[:, None]
        cov -= (obs / f_star)[:, None, None] * (px[:, :, None] * px[:, None, :])
        cov = 0.5 * (cov + cov.transpose(0, 2, 1))
        sum_log_f += obs * np.log(f_star)
        sum_v2_f += obs * v * v / f_star
        n += obs
        if store:
            out_coef[t, active] = coef[active]
            out_var[t, active] = np.diagonal(cov, axis1=1, axis2=2)[active]
    return _FilterOut(out_coef, out_var, sum_log_f, sum_v2_f, n, coef, cov)


def _concentrated_ll(out: _FilterOut) -> np.ndarray:
    with np.errstate(divide="ignore", invalid="ignore"):
        s2 = out.sum_v2_f / out.n
        ll = -0.5 * (out.n * (np.log(2 * np.pi) + 1.0 + np.log(s2)) + out.sum_log_f)
    return np.where(out.n > 0, ll, -np.inf)


def _gaussian_ll(out: _FilterOut, s2: np.ndarray) -> np.ndarray:
    with np.errstate(divide="ignore", invalid="ignore"):
        return -0.5 * (out.n * np.log(2 * np.pi * s2) + out.sum_log_f + out.sum_v2_f / s2)


def _golden_max(func, lo: np.ndarray, hi: np.ndarray, tol: float) -> np.ndarray:
    """Vectorised golden-section search for the maximum of ``func`` on [lo, hi]."""
    g = (np.sqrt(5.0) - 1.0) / 2.0
    a, b = lo.copy(), hi.copy()
    c, d = b - g * (b - a), a + g * (b - a)
    fc, fd = func(c), func(d)
    while np.max(b - a) > tol:
        left = fc >= fd
        b = np.where(left, d, b)
        a = np.where(left, a, c)
        new_c, new_d = b - g * (b - a), a + g * (b - a)
        # One of the two interior points is reused; evaluate the fresh one.
        probe = np.where(left, new_c, new_d)
        fp = func(probe)
        fd_new = np.where(left, fc, fp)
        fc_new = np.where(left, fp, fd)
        c, d, fc, fd = new_c, new_d, fc_new, fd_new
    return np.where(fc >= fd, c, d)
