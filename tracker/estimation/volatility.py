"""Variance forecasts for a return series: EWMA (RiskMetrics 1996) and GARCH(1,1) (Bollerslev 1986).

Timing convention, shared by every module in ``tracker.estimation``:

* ``h[t]`` is the forecast of ``Var(r[t])`` made at the close of row ``t - 1``, i.e. from
  ``r[0], ..., r[t-1]`` only.  The premium filters use ``h[t]`` as the measurement-variance
  scale of ``r[t]``, so nothing from row ``t`` leaks into its own measurement variance.
* After the last row, ``VarianceState.h_next`` is the forecast for the next, not yet seen row;
  it is also where a later chunk of returns picks up (fixed-parameter incremental path).

Returns are decimal and are treated as having zero mean (common practice for RiskMetrics:
at daily and monthly horizons the mean is negligible next to the volatility).  Rows whose
return is not finite are missing: they carry the previous forecast forward and do not update it.

EWMA recursion, ``lam`` in (0, 1) (RiskMetrics: 0.94 daily, 0.97 monthly)::

    h[t+1] = lam * h[t] + (1 - lam) * r[t]**2

Initialisation without look-ahead: the first valid row has no forecast (NaN); while fewer
than ``n_init`` valid returns have been seen, ``h`` is the mean of the squared returns seen so
far; the EWMA recursion starts from the mean of the first ``n_init`` squared returns.  The
rows before that are counted in ``VarianceForecast.n_warmup``.  A stated starting variance
(``initial_variance``) replaces the warm-up and starts the recursion at the first row.

GARCH(1,1) recursion with decimal parameters ``omega, alpha, beta``::

    h[t+1] = omega + alpha * r[t]**2 + beta * h[t]

started, as arch does, at ``h[0] = omega + (alpha + beta) * b`` with ``b`` arch's backcast
(exponentially weighted mean of the first 75 squared returns); those first rows therefore see
a little of the warm-up sample.  Parameters are estimated with arch in percent units.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.signal import lfilter

__all__ = [
    "EwmaParams",
    "GarchParams",
    "VarianceState",
    "VarianceForecast",
    "GarchFit",
    "ewma_variance",
    "garch_variance",
    "fit_garch",
    "garch_backcast",
]

_PERCENT = 100.0


def _float_or_none(x: float) -> float | None:
    return None if not np.isfinite(x) else float(x)


def _none_to_nan(x: float | None) -> float:
    return float("nan") if x is None else float(x)


@dataclass(frozen=True)
class EwmaParams:
    """EWMA settings.

    Parameters
    ----------
    lam : float
        Decay in (0, 1); RiskMetrics uses 0.94 for daily and 0.97 for monthly data.
    n_init : int
        Number of valid returns whose mean square starts the recursion (>= 1).
    """

    lam: float = 0.94
    n_init: int = 20

    def __post_init__(self) -> None:
        if not 0.0 < self.lam < 1.0:
            raise ValueError("lam must be strictly between 0 and 1")
        if int(self.n_init) < 1:
            raise ValueError("n_init must be at least 1")

    @classmethod
    def daily(cls) -> EwmaParams:
        return cls(lam=0.94)

    @classmethod
    def monthly(cls) -> EwmaParams:
        return cls(lam=0.97)

    def to_dict(self) -> dict:
        return {"lam": float(self.lam), "n_init": int(self.n_init)}

    @classmethod
    def from_dict(cls, d: dict) -> EwmaParams:
        return cls(lam=float(d["lam"]), n_init=int(d["n_init"]))


@dataclass(frozen=True)
class GarchParams:
    """GARCH(1,1) parameters in decimal units (``omega`` in squared decimal returns)."""

    omega: float
    alpha: float
    beta: float

    def to_dict(self) -> dict:
        return {"omega": float(self.omega), "alpha": float(self.alpha), "beta": float(self.beta)}

    @classmethod
    def from_dict(cls, d: dict) -> GarchParams:
        return cls(omega=float(d["omega"]), alpha=float(d["alpha"]), beta=float(d["beta"]))


@dataclass(frozen=True)
class VarianceState:
    """Where a variance recursion stopped.

    Attributes
    ----------
    h_next : float
        Forecast of the variance of the next, not yet seen row (NaN before any data).
    n_obs : int
        Valid returns seen so far.
    started : bool
        True once the recursion runs (EWMA: after ``n_init`` valid returns or from a stated
        start; GARCH: always).
    sum_sq : float
        EWMA warm-up only: sum of the squared returns seen before the recursion started.
    """

    h_next: float = float("nan")
    n_obs: int = 0
    started: bool = False
    sum_sq: float = 0.0

    def to_dict(self) -> dict:
        return {"h_next": _float_or_none(self.h_next), "n_obs": int(self.n_obs),
                "started": bool(self.started), "sum_sq": float(self.sum_sq)}

    @classmethod
    def from_dict(cls, d: dict) -> VarianceState:
        return cls(h_next=_none_to_nan(d["h_next"]), n_obs=int(d["n_obs"]),
                   started=bool(d["started"]), sum_sq=float(d["sum_sq"]))


@dataclass(frozen=True)
class VarianceForecast:
    """Variance forecasts for a block of rows.

    Attributes
    ----------
    h : ndarray, shape (T,)
        ``h[t]`` = forecast of ``Var(r[t])`` from rows before ``t`` (decimal squared units).
    state : VarianceState
        End state; ``state.h_next`` is the forecast for the row after the block.
    n_warmup : int
        Leading rows of this block whose ``h`` comes from the EWMA warm-up (NaN or a
        running mean square) rather than the recursion.
    """

    h: np.ndarray
    state: VarianceState
    n_warmup: int


@dataclass(frozen=True)
class GarchFit:
    """GARCH(1,1) estimate.

    Attributes
    ----------
    params : GarchParams
        Decimal-unit parameters (NaN unless ``status == 'ok'``).
    loglik : float
        Gaussian log likelihood of the percent-unit returns, as arch reports it.
    status : str
        'ok', 'not_converged', 'too_little_data' or 'failed'.
    message : str
        Plain-words explanation.
    n_iter : int
        Optimizer iterations.
    forecast : VarianceForecast or None
        ``h`` at the estimated parameters for the fitted rows (None unless 'ok').
    """

    params: GarchParams
    loglik: float
    status: str
    message: str
    n_iter: int
    forecast: VarianceForecast | None


def _returns(r) -> np.ndarray:
    r = np.asarray(r, dtype=float)
    if r.ndim != 1:
        raise ValueError("returns must be a 1-D array of shape (T,)")
    return r


def _rows_before(valid: np.ndarray) -> np.ndarray:
    """Number of valid rows strictly before each row: indexes the forecast that applies."""
    return np.cumsum(valid) - valid


def ewma_variance(r, params: EwmaParams = EwmaParams(), state: VarianceState | None = None,
                  initial_variance: float | None = None) -> VarianceForecast:
    """EWMA variance forecasts, optionally continuing from a saved state.

    Parameters
    ----------
    r : array_like, shape (T,)
        Decimal returns; non-finite entries are missing rows.
    params : EwmaParams
        Decay and warm-up length.
    state : VarianceState, optional
        End state of the previous block; the result is identical (to rounding) to running
        the concatenated series in one pass.  Cost is O(T) in the new rows only.
    initial_variance : float, optional
        Stated start ``h[0]`` (used only when ``state`` is None); skips the warm-up.

    Returns
    -------
    VarianceForecast
    """
    r = _returns(r)
    lam, n_init = float(params.lam), int(params.n_init)
    if state is None:
        state = (VarianceState() if initial_variance is None
                 else VarianceState(h_next=float(initial_variance), started=True))
    valid = np.isfinite(r)
    x = r[valid] ** 2
    n0 = state.n_obs
    # seq[k] = forecast before the k-th new valid row; seq[-1] is the new h_next
    seq = np.empty(x.size + 1)
    n_warm = 0 if state.started else min(n_init - n0, x.size)
    s_end = state.sum_sq
    if state.started:
        seq[0] = state.h_next
    else:
        # sequential cumsum keeps a chunked run bit-identical to a one-pass run
        sums = np.cumsum(np.concatenate(([state.sum_sq], x[:n_warm])))
        counts = n0 + np.arange(n_warm + 1)
        seq[: n_warm + 1] = np.where(counts > 0, sums / np.maximum(counts, 1), np.nan)
        s_end = float(sums[-1])
    if x.size > n_warm:
        zi = np.array([lam * seq[n_warm]])
        seq[n_warm + 1:] = lfilter([1.0 - lam], [1.0, -lam], x[n_warm:], zi=zi)[0]
    before = _rows_before(valid)
    # a missing row gets the forecast that was current when it arrived (carried forward)
    h = seq[before]
    n_warmup_rows = 0 if state.started else int(np.count_nonzero(n0 + before < n_init))
    n_obs = n0 + int(x.size)
    new_state = VarianceState(h_next=float(seq[-1]), n_obs=n_obs,
                              started=state.started or n_obs >= n_init,
                              sum_sq=s_end)
    return VarianceForecast(h=h, state=new_state, n_warmup=n_warmup_rows)


def garch_backcast(r) -> float:
    """arch's starting value: 0.94-weighted mean of the first min(75, T) squared returns."""
    r = _returns(r)
    r = r[np.isfinite(r)]
    tau = min(75, r.size)
    if tau == 0:
        return float("nan")
    w = 0.94 ** np.arange(tau)
    return float(np.sum(r[:tau] ** 2 * (w / w.sum())))


def garch_variance(r, params: GarchParams, state: VarianceState | None = None) -> VarianceForecast:
    """GARCH(1,1) variance forecasts at fixed parameters, optionally continuing a saved state.

    Parameters
    ----------
    r : array_like, shape (T,)
        Decimal returns; non-finite entries are missing rows.
    params : GarchParams
        Decimal-unit parameters.
    state : VarianceState, optional
        End state of the previous block.  Without it the recursion starts at
        ``omega + (alpha + beta) * garch_backcast(r)`` exactly as arch does.

    Returns
    -------
    VarianceForecast
    """
    r = _returns(r)
    om, al, be = float(params.omega), float(params.alpha), float(params.beta)
    valid = np.isfinite(r)
    x = r[valid] ** 2
    if state is None:
        b = garch_backcast(r)
        state = VarianceState(h_next=om + al * b + be * b, n_obs=0, started=True)
    seq = np.empty(x.size + 1)
    seq[0] = state.h_next
    if x.size:
        seq[1:] = lfilter([1.0], [1.0, -be], om + al * x, zi=np.array([be * seq[0]]))[0]
    h = seq[_rows_before(valid)]
    new_state = VarianceState(h_next=float(seq[-1]), n_obs=state.n_obs + int(x.size),
                              started=True)
    return VarianceForecast(h=h, state=new_state, n_warmup=0)


def fit_garch(r, min_obs: int = 100) -> GarchFit:
    """Estimate GARCH(1,1) with zero mean and normal errors using arch, in percent units.

    Parameters
    ----------
    r : array_like, shape (T,)
        Decimal returns; non-finite rows are dropped for estimation and carried forward in
        the returned forecasts.
    min_obs : int
        Fewer valid returns give status 'too_little_data'.

    Returns
    -------
    GarchFit
    """
    from arch import arch_model

    r = _returns(r)
    nan_params = GarchParams(float("nan"), float("nan"), float("nan"))
    rv = r[np.isfinite(r)]
    if rv.size < min_obs:
        return GarchFit(nan_params, float("nan"), "too_little_data",
                        f"{rv.size} valid returns; GARCH(1,1) needs at least {min_obs}.", 0, None)
    if not np.any(rv != 0.0):
        return GarchFit(nan_params, float("nan"), "failed",
                        "All returns are zero; there is no variance to model.", 0, None)
    try:
        res = arch_model(_PERCENT * rv, mean="Zero", vol="GARCH", p=1, q=1, dist="normal",
                         rescale=False).fit(disp="off", show_warning=False)
    except (ValueError, np.linalg.LinAlgError, FloatingPointError) as exc:
        return GarchFit(nan_params, float("nan"), "failed", f"arch failed: {exc}", 0, None)
    opt = res.optimization_result
    n_iter = int(getattr(opt, "nit", 0) or 0)
    if res.convergence_flag != 0:
        return GarchFit(nan_params, float("nan"), "not_converged",
                        f"Optimizer did not converge: {getattr(opt, 'message', '')}", n_iter, None)
    om, al, be = (float(v) for v in res.params.to_numpy())
    params = GarchParams(omega=om / _PERCENT**2, alpha=al, beta=be)
    return GarchFit(params, float(res.loglikelihood), "ok", "GARCH(1,1) estimated.", n_iter,
                    garch_variance(r, params))
