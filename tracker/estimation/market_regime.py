"""Joint market regime across factors: a Gaussian hidden Markov model.

Model, for the T x N matrix of factor returns x_t (decimal per period)::

    x_t | S_t = k ~ N(mu_k, Sigma_k),   P(S_{t+1}=j | S_t=i) = transition[i, j]

estimated by EM (Baum-Welch) for each number of states in 2..4, the number chosen by
BIC. The EM is hmmlearn's ``GaussianHMM`` algorithm with its update rules; on long
histories it runs as a compiled pass (:mod:`tracker.estimation.gaussian_hmm`, hmmlearn
its reference twin in the tests), on short ones in hmmlearn itself. Choices and the
library traps they avoid:

* Units: each factor column is divided by its sample standard deviation before the fit.
  hmmlearn adds ``covars_prior`` (1e-2) to every covariance entry and ``min_covar``
  (1e-3) to the initial ones, which would swamp decimal daily variances (~1e-4); on
  standardised data they are negligible. Results are converted back to decimal.
* Covariance: ``'full'`` (default; regimes differ in correlation, not only volatility)
  or ``'diag'`` (independent factors within a state; use it when N is large, since
  'full' has N(N+1)/2 parameters per state).
* Initialisation: our own, not hmmlearn's k-means on returns (k-means groups days by the
  *sign* of returns, while market regimes differ by volatility and correlation). Days
  are split into K groups by quantiles of a smoothed cross-sectional volatility proxy;
  further seeds draw random quantile cuts and window lengths.
* Convergence: hmmlearn stops at ``n_iter`` and still says converged, so we judge it
  ourselves from the log-likelihood history: converged only if the last change of the
  log-likelihood is below ``tol``. ``n_iter`` defaults to 1000, not hmmlearn's 10.
* States are ordered calmest first by total volatility sqrt(trace(Sigma_k)) (decimal),
  with label stability across refits as in
  :func:`tracker.estimation.markov_regimes.order_regimes`.
* Real-time probabilities come from our forward filter
  (:func:`tracker.estimation.markov_regimes.forward_filter`), never from hmmlearn's
  ``predict``/``predict_proba``, which use the whole sequence.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from scipy.linalg import solve_triangular

from tracker.estimation import gaussian_hmm
from tracker.estimation.gaussian_hmm import HmmParams
from tracker.estimation.markov_regimes import (
    TRANSITION_CONVENTION,
    RegimeFiltered,
    RegimeFilterState,
    filter_from_log_densities,
    order_regimes,
)

COVARIANCE_TYPES = ("full", "diag")
_LOG_2PI = math.log(2.0 * math.pi)


def _frozen(x, ndim: int) -> np.ndarray:
    arr = np.array(x, dtype=float, ndmin=ndim, copy=True)
    arr.flags.writeable = False
    return arr


def n_free_parameters(n_states: int, n_factors: int, covariance_type: str) -> int:
    """Free parameters of a Gaussian HMM: start (K-1) + transition K(K-1) + means KN
    + covariances (KN(N+1)/2 full, KN diag)."""
    k, n = int(n_states), int(n_factors)
    cov = k * n * (n + 1) // 2 if covariance_type == "full" else k * n
    return (k - 1) + k * (k - 1) + k * n + cov


@dataclass(frozen=True, eq=False)
class MarketRegimeParams:
    """Parameters of the market-regime HMM, decimal units.

    Attributes
    ----------
    n_states : int
        K.
    means : ndarray, shape (K, N)
        mu_k, mean factor returns per period in state k.
    covars : ndarray, shape (K, N, N) for 'full' or (K, N) for 'diag'
        Sigma_k (diag: the variances only, to keep stored JSON small for large N).
    covariance_type : str
        'full' or 'diag'.
    transition : ndarray, shape (K, K)
        Row-stochastic, ``transition[i, j] = P(S_{t+1}=j | S_t=i)``.
    startprob : ndarray, shape (K,)
        P(S_0) of the first fitted row.
    columns : tuple of str or None
        Factor names in column order, so a resumed filter can check its input.
    """

    n_states: int
    means: np.ndarray
    covars: np.ndarray
    covariance_type: str
    transition: np.ndarray
    startprob: np.ndarray
    columns: tuple | None = None
    convention: str = TRANSITION_CONVENTION

    def __post_init__(self):
        k = int(self.n_states)
        object.__setattr__(self, "n_states", k)
        object.__setattr__(self, "means", _frozen(self.means, 2))
        if self.covariance_type not in COVARIANCE_TYPES:
            raise ValueError(f"covariance_type must be one of {COVARIANCE_TYPES}")
        object.__setattr__(self, "covars",
                           _frozen(self.covars, 3 if self.covariance_type == "full" else 2))
        object.__setattr__(self, "transition", _frozen(self.transition, 2))
        object.__setattr__(self, "startprob", _frozen(self.startprob, 1))
        if self.columns is not None:
            object.__setattr__(self, "columns", tuple(str(c) for c in self.columns))
        n = self.means.shape[1]
        want = (k, n, n) if self.covariance_type == "full" else (k, n)
        if self.means.shape[0] != k or self.covars.shape != want:
            raise ValueError("means/covars shapes do not match n_states and covariance_type")
        if self.transition.shape != (k, k) or self.startprob.shape != (k,):
            raise ValueError("transition must be (K, K) and startprob (K,)")
        if self.columns is not None and len(self.columns) != n:
            raise ValueError("columns must name every factor")
        if self.convention != TRANSITION_CONVENTION:
            raise ValueError(f"unknown transition convention {self.convention!r}")

    @classmethod
    def nan(cls, n_states: int, n_factors: int, covariance_type: str, columns=None):
        k, n = int(n_states), int(n_factors)
        cov = np.full((k, n, n) if covariance_type == "full" else (k, n), np.nan)
        return cls(k, np.full((k, n), np.nan), cov, covariance_type,
                   np.full((k, k), np.nan), np.full(k, np.nan), columns)

    @property
    def n_factors(self) -> int:
        return self.means.shape[1]

    @property
    def covariance_matrices(self) -> np.ndarray:
        """Sigma_k as full matrices, shape (K, N, N)."""
        return gaussian_hmm.full_covariances(self.covars, self.covariance_type)

    @property
    def variances(self) -> np.ndarray:
        """Per-factor variances in each state, shape (K, N)."""
        if self.covariance_type == "full":
            return np.diagonal(self.covars, axis1=1, axis2=2).copy()
        return np.array(self.covars)

    @property
    def total_vol(self) -> np.ndarray:
        """sqrt(trace(Sigma_k)), shape (K,): the key states are ordered by."""
        return np.sqrt(self.variances.sum(axis=1))

    @property
    def durations(self) -> np.ndarray:
        """Expected state durations 1 / (1 - p_kk) in periods, shape (K,)."""
        with np.errstate(divide="ignore"):
            return 1.0 / (1.0 - np.diag(self.transition))

    def to_dict(self) -> dict:
        return {
            "n_states": self.n_states,
            "means": self.means.tolist(),
            "covars": self.covars.tolist(),
            "covariance_type": self.covariance_type,
            "transition": self.transition.tolist(),
            "startprob": self.startprob.tolist(),
            "columns": None if self.columns is None else list(self.columns),
            "convention": self.convention,
        }

    @classmethod
    def from_dict(cls, d: dict) -> "MarketRegimeParams":
        return cls(int(d["n_states"]), np.asarray(d["means"], float),
                   np.asarray(d["covars"], float), d["covariance_type"],
                   np.asarray(d["transition"], float), np.asarray(d["startprob"], float),
                   None if d.get("columns") is None else tuple(d["columns"]),
                   d.get("convention", TRANSITION_CONVENTION))


# ----------------------------------------------------------------------------
# Forward filter at fixed parameters
# ----------------------------------------------------------------------------
def mvn_logpdf_matrix(x, means, covars, covariance_type) -> np.ndarray:
    """log N(x_t; mu_k, Sigma_k) for every row and state, shape (T, K).

    Rows with any NaN get 0 in every state (treated as missing: transition only).
    """
    x = np.asarray(x, float)
    means = np.asarray(means, float)
    covars = np.asarray(covars, float)
    t_len, n = x.shape
    k = means.shape[0]
    missing = np.isnan(x).any(axis=1)
    xc = np.where(missing[:, None], 0.0, x)
    out = np.empty((t_len, k))
    for s in range(k):
        r = xc - means[s]
        if covariance_type == "full":
            chol = np.linalg.cholesky(covars[s])
            z = solve_triangular(chol, r.T, lower=True, check_finite=False)
            maha = np.einsum("nt,nt->t", z, z)
            logdet = 2.0 * np.log(np.diag(chol)).sum()
        else:
            maha = (r * r / covars[s][None, :]).sum(axis=1)
            logdet = np.log(covars[s]).sum()
        out[:, s] = -0.5 * (n * _LOG_2PI + logdet + maha)
    out[missing] = 0.0
    return out


def market_filter(x, params: MarketRegimeParams,
                  state: RegimeFilterState | None = None) -> RegimeFiltered:
    """Filter rows of factor returns at fixed parameters, O(new rows).

    Parameters
    ----------
    x : array_like, shape (T, N)
        Factor returns in the units of ``params`` (decimal), columns in
        ``params.columns`` order.
    params : MarketRegimeParams
    state : RegimeFilterState, optional
        Saved state; default starts from ``params.startprob`` (as hmmlearn's ``score``).
    """
    x = np.asarray(x, float)
    if x.ndim == 1:
        x = x[None, :]
    if x.shape[1] != params.n_factors:
        raise ValueError("x has a different number of factors than params")
    if state is None:
        state = RegimeFilterState.start(params.startprob)
    if state.k_regimes != params.n_states:
        raise ValueError("state and params have different numbers of states")
    log_dens = mvn_logpdf_matrix(x, params.means, params.covars, params.covariance_type)
    return filter_from_log_densities(log_dens, params.transition, state)


# ----------------------------------------------------------------------------
# Fit results
# ----------------------------------------------------------------------------
@dataclass(frozen=True, eq=False)
class MarketRegimeCandidate:
    """Best fit for one number of states.

    Attributes
    ----------
    n_states : int
    status, message : str
        'ok', 'not_converged', 'unidentified', 'too_little_data' or 'failed'.
    loglik : float
        Log-likelihood of the decimal data at the best seed (NaN unless ok).
    n_params : int
        Free parameters (:func:`n_free_parameters`).
    bic : float
        -2 loglik + n_params log T (NaN unless ok).
    converged : bool
    n_iter : int
        EM iterations of the kept seed.
    seed : int
        Seed of the kept initialisation (-1 if none).
    """

    n_states: int
    status: str
    message: str
    loglik: float
    n_params: int
    bic: float
    converged: bool
    n_iter: int
    seed: int


@dataclass(frozen=True, eq=False)
class MarketRegimeFit:
    """Result of :meth:`MarketRegimeModel.fit`.

    On any status other than 'ok' the numeric fields are NaN and ``filtered`` is None.

    Attributes
    ----------
    status, message : str
    n_states : int
        Chosen by BIC (the largest candidate tried when nothing was usable).
    n_obs, n_factors : int
    params : MarketRegimeParams
        States ordered calmest first; decimal units.
    loglik, bic : float
        Of the chosen model on the decimal data.
    converged : bool
    candidates : tuple of MarketRegimeCandidate
        One per number of states tried.
    state_share : ndarray, shape (K,)
        Average filtered probability of each state over the sample.
    order : tuple of int
        ``order[k]`` = the EM's raw state index reported as state k.
    previous_match : tuple of int or None
        With a previous fit of the same shape: previous state each state resembles most.
    scale : ndarray, shape (N,)
        Column standard deviations used to standardise before fitting.
    filtered : RegimeFiltered or None
        Forward filter over the fit sample from ``params.startprob``.
    warnings : tuple of str
    """

    status: str
    message: str
    n_states: int
    n_obs: int
    n_factors: int
    params: MarketRegimeParams
    loglik: float = np.nan
    bic: float = np.nan
    converged: bool = False
    candidates: tuple = ()
    state_share: np.ndarray = field(default_factory=lambda: np.array([]))
    order: tuple = ()
    previous_match: tuple | None = None
    scale: np.ndarray = field(default_factory=lambda: np.array([]))
    filtered: RegimeFiltered | None = None
    warnings: tuple = ()

    @property
    def ok(self) -> bool:
        return self.status == "ok"

    @property
    def bic_by_states(self) -> dict:
        """{n_states: BIC} for every candidate (NaN where the candidate was unusable)."""
        return {c.n_states: c.bic for c in self.candidates}


def em_converged(run, tol: float) -> bool:
    """Our convergence verdict from an EM run's ``history`` (an
    :class:`~tracker.estimation.gaussian_hmm.EmResult` or an hmmlearn ``monitor_``).

    hmmlearn's ``monitor_.converged`` is also True when EM merely hit ``n_iter``; here
    only a last log-likelihood change below ``tol`` counts.
    """
    hist = list(run.history)
    return len(hist) >= 2 and abs(hist[-1] - hist[-2]) < tol


@dataclass(frozen=True)
class EmStart:
    """One EM run of a market fit: ``n_states`` states from start ``draw`` (0: quantile
    cuts of the volatility proxy; 1, 2, ...: random cuts; -1: the previous fit's optimum)."""

    n_states: int
    draw: int


@dataclass(frozen=True, eq=False)
class EmRun:
    """What one EM run gave (:meth:`MarketRegimeModel.run_start`): status 'ok',
    'failed', 'not_converged' or 'unidentified', the log-likelihood of the standardised
    data at its optimum (NaN unless ok), its EM iterations and parameters (None unless ok)."""

    start: EmStart
    status: str
    message: str
    llf: float
    n_iter: int
    params: HmmParams | None


@dataclass(frozen=True, eq=False)
class PreparedMarketFit:
    """A market fit's checked data and the EM runs it needs (:meth:`MarketRegimeModel.prepare`)."""

    x: np.ndarray                      # (T, N) decimal
    z: np.ndarray                      # x / scale
    scale: np.ndarray                  # (N,) column standard deviations
    columns: tuple | None
    previous: MarketRegimeParams | None
    warm: MarketRegimeParams | None    # the warm start, if this is a warm refit
    states: tuple[int, ...]            # numbers of states tried
    too_small: tuple[int, ...]         # of those, the ones with too few data per parameter
    starts: tuple[EmStart, ...]


# ----------------------------------------------------------------------------
# Estimator
# ----------------------------------------------------------------------------
class MarketRegimeModel:
    """Gaussian HMM market regime with the number of states chosen by BIC.

    Parameters
    ----------
    states : sequence of int
        Numbers of states tried (default 2, 3, 4).
    covariance_type : {'full', 'diag'}
    n_seeds : int
        Initialisations per number of states; the best converged likelihood is kept.
    n_iter : int
        EM iteration cap.
    tol : float
        Convergence threshold on the change of the total log-likelihood of the
        standardised data between EM iterations.
    seed : int
        Base seed; initialisation i of every candidate uses ``seed + i``.
    min_obs : int
        Fewer rows give 'too_little_data'. Each candidate also needs at least
        ``min_obs_per_param`` data points (T * N) per free parameter.
    min_state_share, min_state_obs : float
        A state with a smaller average filtered probability, or fewer expected rows,
        makes the candidate 'unidentified'.
    min_covar, covars_prior : float
        hmmlearn's regularisation (standardised units): added to the starting
        covariances' diagonal, and to every covariance entry in each M step.
    engine : {'auto', 'compiled', 'hmmlearn'}
        Who runs the EM (:func:`tracker.estimation.gaussian_hmm.fit`); 'auto' compiles
        long histories and leaves short ones to hmmlearn.
    vol_tie_ratio : float
        See :func:`tracker.estimation.markov_regimes.order_regimes`.
    init_window : int
        Rolling window (rows) of the volatility proxy used by the first initialisation.
    """

    def __init__(self, states=(2, 3, 4), *, covariance_type: str = "full", n_seeds: int = 3,
                 n_iter: int = 1000, tol: float = 1e-2, seed: int = 0, min_obs: int = 250,
                 min_obs_per_param: float = 10.0, min_state_share: float = 0.01,
                 min_state_obs: float = 10.0, min_covar: float = 1e-3,
                 covars_prior: float = 1e-2, vol_tie_ratio: float = 1.05,
                 init_window: int = 21, engine: str = "auto"):
        if covariance_type not in COVARIANCE_TYPES:
            raise ValueError(f"covariance_type must be one of {COVARIANCE_TYPES}")
        states = tuple(sorted(int(s) for s in states))
        if not states or states[0] < 2:
            raise ValueError("states must be integers >= 2")
        self.states = states
        self.covariance_type = covariance_type
        self.n_seeds = int(n_seeds)
        self.n_iter = int(n_iter)
        self.tol = float(tol)
        self.seed = int(seed)
        self.min_obs = int(min_obs)
        self.min_obs_per_param = float(min_obs_per_param)
        self.min_state_share = float(min_state_share)
        self.min_state_obs = float(min_state_obs)
        self.min_covar = float(min_covar)
        self.covars_prior = float(covars_prior)
        self.vol_tie_ratio = float(vol_tie_ratio)
        self.init_window = int(init_window)
        self.engine = engine

    @staticmethod
    def filter(x, params: MarketRegimeParams,
               state: RegimeFilterState | None = None) -> RegimeFiltered:
        """Fixed-parameter path, see :func:`market_filter`."""
        return market_filter(x, params, state)

    # -- initialisation --------------------------------------------------------
    def _random_cut(self, k: int, draw: int):
        """(window, cuts) of random start ``draw`` (1, 2, ...) of ``k`` states.

        Each number of states has its own stream (seed ``seed + 7919 k``) and start
        ``draw`` takes its ``draw``-th pair from it, so any start can be made on its own,
        in any process, and is the same as when the starts run one after another.
        """
        rng = np.random.default_rng(self.seed + 7919 * k)
        for _ in range(draw):
            window = int(rng.integers(5, 64))
            # random cut points with every group holding at least 5% of the rows
            while True:
                cuts = np.sort(rng.uniform(0.05, 0.95, k - 1))
                if np.all(np.diff(np.r_[0.0, cuts, 1.0]) >= 0.05):
                    break
        return window, cuts

    def _initial_groups(self, z, k, draw: int):
        """Assign each row to one of k groups by a smoothed volatility proxy: at quantile
        cuts over a ``init_window`` window for draw 0, at random ones after."""
        t_len = z.shape[0]
        if draw == 0:
            window, cuts = self.init_window, np.linspace(0, 1, k + 1)[1:-1]
        else:
            window, cuts = self._random_cut(k, draw)
        proxy = np.convolve((z * z).mean(axis=1), np.ones(window) / window, mode="same")
        edges = np.quantile(proxy, cuts)
        groups = np.searchsorted(edges, proxy, side="right")
        if np.bincount(groups, minlength=k).min() < max(2, z.shape[1] + 1):
            groups = np.argsort(np.argsort(proxy, kind="stable")) * k // t_len
        return groups

    def _start(self, k, z, groups) -> HmmParams:
        """EM start from a grouping of the rows: group means and covariances, equal start
        probabilities, 0.95 on the transition diagonal."""
        n = z.shape[1]
        trans = np.full((k, k), 0.05 / (k - 1))
        np.fill_diagonal(trans, 0.95)
        means = np.array([z[groups == s].mean(axis=0) for s in range(k)])
        covs = np.array([np.cov(z[groups == s].T).reshape(n, n) + self.min_covar * np.eye(n)
                         for s in range(k)])
        if self.covariance_type == "diag":
            covs = np.diagonal(covs, axis1=1, axis2=2)
        return HmmParams(np.full(k, 1.0 / k), trans, means, covs, self.covariance_type)

    def _warm_start(self, previous: MarketRegimeParams, scale) -> HmmParams:
        """EM start at a previous fit's parameters (standardised units)."""
        n = scale.size
        start = np.clip(np.asarray(previous.startprob, float), 1e-6, None)
        trans = np.clip(np.asarray(previous.transition, float), 1e-6, None)
        full = previous.covariance_matrices / np.outer(scale, scale)[None, :, :]
        full = full + self.min_covar * np.eye(n)[None]
        covs = full if self.covariance_type == "full" else np.diagonal(full, axis1=1, axis2=2)
        return HmmParams(start / start.sum(), trans / trans.sum(axis=1, keepdims=True),
                         np.asarray(previous.means, float) / scale[None, :], covs,
                         self.covariance_type)

    # -- one EM run --------------------------------------------------------------
    def run_start(self, prepared: PreparedMarketFit, start: EmStart) -> EmRun:
        """One EM run of a prepared fit, with our convergence and identification verdicts.

        The runs of a fit are independent of each other: :meth:`fit` makes them one after
        another; a caller with workers may hand each to one (:meth:`prepare`,
        :meth:`finish`).
        """
        z, k, i = prepared.z, start.n_states, start.draw
        seed = self.seed + max(i, 0)
        try:
            if i < 0:
                init = self._warm_start(prepared.warm, prepared.scale)
            else:
                init = self._start(k, z, self._initial_groups(z, k, i))
            run = gaussian_hmm.fit(z, init, n_iter=self.n_iter, tol=self.tol,
                                   covars_prior=self.covars_prior, min_covar=self.min_covar,
                                   engine=self.engine)
        except Exception as exc:  # one bad initialisation must not sink the rest
            return EmRun(start, "failed", f"seed {seed}: failed ({exc})", np.nan, 0, None)
        if not em_converged(run, self.tol):
            return EmRun(start, "not_converged", f"seed {seed}: not converged after "
                         f"{run.n_iter} EM iterations", np.nan, run.n_iter, None)
        problem, llf = self._identification_problem(run.params, z)
        if problem is not None:
            return EmRun(start, "unidentified", f"seed {seed}: {problem}", np.nan,
                         run.n_iter, None)
        return EmRun(start, "ok", "ok", llf, run.n_iter, run.params)

    def _candidate(self, prepared: PreparedMarketFit, k: int, runs: list[EmRun]):
        """The best of ``runs`` (one number of states, in start order): the candidate and
        its EM parameters (None unless usable)."""
        t_len, n = prepared.z.shape
        n_params = n_free_parameters(k, n, self.covariance_type)
        if k in prepared.too_small:
            return MarketRegimeCandidate(
                k, "too_little_data",
                f"{t_len * n} data points for {n_params} parameters", np.nan, n_params,
                np.nan, False, 0, -1), None
        best = None
        for run in runs:
            if run.status == "ok" and (best is None or run.llf > best.llf):
                best = run
        if best is None:
            text = "; ".join(r.message for r in runs)
            found = {r.status for r in runs}
            status = next((st for st in ("not_converged", "unidentified") if st in found),
                          "failed")
            return MarketRegimeCandidate(k, status, text, np.nan, n_params, np.nan, False,
                                         0, -1), None
        log_shift = t_len * float(np.log(prepared.scale).sum())  # standardised -> decimal
        llf_dec = best.llf - log_shift
        bic = -2.0 * llf_dec + n_params * math.log(t_len)
        return MarketRegimeCandidate(k, "ok", "ok", llf_dec, n_params, bic, True,
                                     best.n_iter, self.seed + max(best.start.draw, 0)), best.params

    def _identification_problem(self, params: HmmParams, z):
        """(problem or None, log-likelihood of ``z`` at ``params`` by the forward filter)."""
        if not (np.all(np.isfinite(params.means)) and np.all(np.isfinite(params.transmat))
                and np.all(np.isfinite(params.covars))):
            return "non-finite parameters", np.nan
        k = params.n_states
        for s in range(k):
            eig = np.linalg.eigvalsh(params.full_covars[s])
            if not np.all(np.isfinite(eig)) or eig.min() <= 1e-8 * max(eig.max(), 1e-300):
                return f"state {s} has a degenerate covariance", np.nan
        log_dens = mvn_logpdf_matrix(z, params.means, params.covars, self.covariance_type)
        filt = filter_from_log_densities(log_dens, params.transmat,
                                         RegimeFilterState.start(params.startprob))
        share = filt.filtered.mean(axis=0)
        for s in range(k):
            if share[s] < self.min_state_share or share[s] * z.shape[0] < self.min_state_obs:
                return (f"state {s} has almost no weight (average probability "
                        f"{share[s]:.4f})"), np.nan
        return None, float(filt.loglik)

    # -- public fit -------------------------------------------------------------
    def _failure(self, status, message, n_obs, n_factors, k=None, columns=None, **extra):
        k = k if k is not None else self.states[-1]
        return MarketRegimeFit(
            status, message, k, n_obs, n_factors,
            MarketRegimeParams.nan(k, n_factors, self.covariance_type, columns),
            state_share=np.full(k, np.nan), **extra)

    def fit(self, x, previous: MarketRegimeParams | None = None, columns=None,
            warm_start: bool = False) -> MarketRegimeFit:
        """Fit every candidate number of states and keep the BIC choice.

        Parameters
        ----------
        x : array_like, shape (T, N)
            Decimal factor returns, finite. A pandas DataFrame's column names are kept.
        previous : MarketRegimeParams, optional
            Last fit: keeps state labels stable when the shape is unchanged.
        warm_start : bool
            With ``previous`` of the same factors: a refit that keeps the number of
            states and starts from the previous optimum and from the default start
            (instead of every candidate number of states from ``n_seeds`` starts each).
            A cold fit re-selects the number of states by BIC.
        columns : sequence of str, optional
            Factor names (overrides a DataFrame's).

        The same as :meth:`prepare`, :meth:`run_start` for each of its ``starts`` and
        :meth:`finish`, which is how a caller with workers spreads the EM runs.
        """
        prepared = self.prepare(x, previous, columns, warm_start)
        if isinstance(prepared, MarketRegimeFit):
            return prepared
        return self.finish(prepared, [self.run_start(prepared, s) for s in prepared.starts])

    def prepare(self, x, previous: MarketRegimeParams | None = None, columns=None,
                warm_start: bool = False) -> PreparedMarketFit | MarketRegimeFit:
        """Check and standardise the data and list the EM runs the fit needs (arguments as
        in :meth:`fit`); a failed fit when the data cannot be fitted at all."""
        if columns is None and hasattr(x, "columns"):
            columns = tuple(str(c) for c in x.columns)
        x = np.asarray(x, float)
        if x.ndim != 2:
            raise ValueError("x must be a (T, N) matrix")
        t_len, n = x.shape
        if t_len < self.min_obs:
            return self._failure("too_little_data",
                                 f"{t_len} rows; at least {self.min_obs} are needed",
                                 t_len, n, columns=columns)
        if not np.all(np.isfinite(x)):
            return self._failure("failed", "factor returns contain NaN or infinite values; "
                                 "fit needs complete rows", t_len, n, columns=columns)
        scale = x.std(axis=0)
        flat = (np.ptp(x, axis=0) == 0) | (scale <= 0)
        if np.any(flat):
            bad = [int(i) for i in np.flatnonzero(flat)]
            return self._failure("failed", f"factor columns {bad} are constant",
                                 t_len, n, columns=columns)
        warm = previous if (warm_start and previous is not None and previous.n_factors == n
                            and previous.n_states in self.states
                            and np.all(np.isfinite(previous.means))
                            and np.all(np.isfinite(previous.covars))) else None
        states = (warm.n_states,) if warm is not None else self.states
        too_small = tuple(k for k in states if t_len * n < self.min_obs_per_param
                          * n_free_parameters(k, n, self.covariance_type))
        # a warm refit (k is the previous fit's number of states): its optimum and the default
        # quantile start; a cold fit: the default start and n_seeds - 1 random ones
        draws = (-1, 0) if warm is not None else tuple(range(self.n_seeds))
        starts = tuple(EmStart(k, i) for k in states if k not in too_small for i in draws)
        return PreparedMarketFit(x, x / scale, scale, columns, previous, warm, states,
                                 too_small, starts)

    def finish(self, prepared: PreparedMarketFit, runs) -> MarketRegimeFit:
        """The fit from a prepared fit's EM runs (:meth:`run_start`, in any order): the
        best run of each number of states, the BIC choice among them, states ordered."""
        x, scale, columns, previous = (prepared.x, prepared.scale, prepared.columns,
                                       prepared.previous)
        t_len, n = x.shape
        by_start = {r.start: r for r in runs}
        missing = [s for s in prepared.starts if s not in by_start]
        if missing:
            raise ValueError(f"EM runs missing for {missing}")
        cands, models = [], {}
        for k in prepared.states:
            cand, fitted = self._candidate(
                prepared, k, [by_start[s] for s in prepared.starts if s.n_states == k])
            cands.append(cand)
            if fitted is not None:
                models[k] = fitted
        cands = tuple(cands)
        states = prepared.states
        usable = [c for c in cands if c.status == "ok"]
        if not usable:
            statuses = {c.status for c in cands}
            status = next(s for s in ("not_converged", "unidentified", "too_little_data",
                                      "failed") if s in statuses)
            text = "; ".join(f"{c.n_states} states: {c.message}" for c in cands)
            return self._failure(status, f"no usable model ({text})", t_len, n,
                                 columns=columns, candidates=cands)
        chosen = min(usable, key=lambda c: c.bic)
        notes = [f"{c.n_states} states not usable ({c.status}): BIC chose among the rest"
                 for c in cands if c.status != "ok"]
        if len(states) == 1 and len(self.states) > 1:
            notes.append(f"warm refit: kept {states[0]} states from the previous fit (a cold "
                         "refit re-selects the number of states by BIC)")
        params, order, match = self._ordered_params(models[chosen.n_states], scale, previous,
                                                    columns)
        filt = market_filter(x, params)
        if match is not None and tuple(match) != tuple(range(params.n_states)):
            pairs = ", ".join(f"{i}->{j}" for i, j in enumerate(match) if i != j)
            notes.append("state meanings changed since the previous fit (new state -> "
                         f"closest previous state: {pairs})")
        return MarketRegimeFit(
            "ok", "ok", chosen.n_states, t_len, n, params, loglik=filt.loglik,
            bic=-2.0 * filt.loglik + chosen.n_params * math.log(t_len), converged=True,
            candidates=cands, state_share=filt.filtered.mean(axis=0), order=order,
            previous_match=match, scale=scale, filtered=filt, warnings=tuple(notes))

    def _ordered_params(self, fitted: HmmParams, scale, previous, columns):
        k = fitted.n_states
        means = fitted.means * scale[None, :]
        full = fitted.full_covars * np.outer(scale, scale)[None, :, :]
        variances = np.diagonal(full, axis1=1, axis2=2)
        dist = None
        if (previous is not None and previous.n_states == k
                and previous.n_factors == means.shape[1]
                and np.all(np.isfinite(previous.variances))):
            dist = state_distance(means, variances, previous)
        order, match = order_regimes(np.sqrt(variances.sum(axis=1)), means.mean(axis=1), dist,
                                     self.vol_tie_ratio)
        o = list(order)
        covars = full[o] if self.covariance_type == "full" else variances[o]
        params = MarketRegimeParams(k, means[o], covars, self.covariance_type,
                                    fitted.transmat[np.ix_(o, o)], fitted.startprob[o], columns)
        return params, order, match


def state_distance(means, variances, prev: MarketRegimeParams) -> np.ndarray:
    """Distance between raw states and a previous fit's states, shape (K, K_prev).

    Averaged over factors: |log(sd_i / sd_j)| + |mu_i - mu_j| / pooled previous sd.
    """
    sd = np.sqrt(np.asarray(variances, float))
    prev_sd = np.sqrt(prev.variances)
    pooled = np.sqrt(prev.variances.mean(axis=0))
    dv = np.abs(np.log(sd[:, None, :] / prev_sd[None, :, :])).mean(axis=2)
    dm = (np.abs(np.asarray(means, float)[:, None, :] - prev.means[None, :, :])
          / pooled[None, None, :]).mean(axis=2)
    return dv + dm
