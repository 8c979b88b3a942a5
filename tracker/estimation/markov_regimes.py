"""Per-factor Markov-switching mean and variance (Hamilton 1989).

Model, for one factor's return series y_t (decimal per period)::

    y_t = mu_{S_t} + sigma_{S_t} * e_t,   e_t ~ N(0, 1)
    P(S_{t+1} = j | S_t = i) = transition[i, j]

with K = 2 (default) or 3 regimes: the model of statsmodels
``MarkovRegression(trend='c', switching_variance=True)``, on returns in *percent*
(statsmodels' optimizer and EM steps are tuned for values of order one), converted back to
decimal units. Two regimes are estimated by the batched EM of
:mod:`tracker.estimation.regime_em` (default ``engine='em'``); three regimes, and
``engine='statsmodels'``, by statsmodels' own fit from several starts
(:func:`fit_best_of`).

Conventions used throughout this module
---------------------------------------
* ``transition`` is **row-stochastic**: ``transition[i, j] = P(S_{t+1}=j | S_t=i)``,
  rows sum to one, and ``predicted = filtered @ transition``. statsmodels uses the
  transpose (column-stochastic, ``[i, j] = P(j -> i)``); the conversion is done only in
  :func:`regime_moments` and :func:`regression_param_vector`.
* Regime 0 is the calmest (lowest volatility). Volatilities within a factor
  ``vol_tie_ratio`` of each other count as tied; ties are resolved by matching the
  previous fit's regimes (when given) and otherwise by higher mean first. See
  :func:`order_regimes`.
* Real-time output only: ``filtered[t] = P(S_t | y_0..y_t)`` and
  ``predicted[t] = P(S_{t+1} | y_0..y_t)`` come from our own forward (Hamilton)
  filter. statsmodels ``predict()``, ``fittedvalues`` and smoothed probabilities use the
  whole sample and are never used for output.
* Log-likelihoods are in the units of the data passed in (decimal returns for the
  estimator); fitting in percent shifts the log-likelihood by ``T * log(100)``.
"""
from __future__ import annotations

import itertools
import math
import warnings
from dataclasses import dataclass, field

import numpy as np
from statsmodels.tsa.regime_switching.markov_regression import MarkovRegression

STATUSES = ("ok", "not_converged", "unidentified", "too_little_data", "failed")
TRANSITION_CONVENTION = "row_stochastic: transition[i, j] = P(S_{t+1}=j | S_t=i)"
PERCENT = 100.0
_LOG_2PI = math.log(2.0 * math.pi)
# Below this many rows the plain recursion beats the blocked one (fixed overhead).
_SMALL_T = 32


def _frozen(x, ndim: int) -> np.ndarray:
    arr = np.array(x, dtype=float, ndmin=ndim, copy=True)
    arr.flags.writeable = False
    return arr


# ----------------------------------------------------------------------------
# Parameters, filter state and filter output
# ----------------------------------------------------------------------------
@dataclass(frozen=True, eq=False)
class RegimeParams:
    """Parameters of a K-regime switching mean/variance model.

    Attributes
    ----------
    k_regimes : int
        K.
    means : ndarray, shape (K,)
        mu_k, mean return per period in regime k (decimal).
    variances : ndarray, shape (K,)
        sigma_k^2, return variance per period in regime k (decimal squared).
    transition : ndarray, shape (K, K)
        Row-stochastic, ``transition[i, j] = P(S_{t+1}=j | S_t=i)``.
    convention : str
        Always :data:`TRANSITION_CONVENTION`; stored so a reader of the JSON knows.
    """

    k_regimes: int
    means: np.ndarray
    variances: np.ndarray
    transition: np.ndarray
    convention: str = TRANSITION_CONVENTION

    def __post_init__(self):
        k = int(self.k_regimes)
        object.__setattr__(self, "k_regimes", k)
        object.__setattr__(self, "means", _frozen(self.means, 1))
        object.__setattr__(self, "variances", _frozen(self.variances, 1))
        object.__setattr__(self, "transition", _frozen(self.transition, 2))
        if self.means.shape != (k,) or self.variances.shape != (k,):
            raise ValueError("means and variances must have shape (k_regimes,)")
        if self.transition.shape != (k, k):
            raise ValueError("transition must have shape (k_regimes, k_regimes)")
        if self.convention != TRANSITION_CONVENTION:
            raise ValueError(f"unknown transition convention {self.convention!r}")

    @classmethod
    def nan(cls, k_regimes: int) -> "RegimeParams":
        """All-NaN parameters, used by failed fits."""
        k = int(k_regimes)
        return cls(k, np.full(k, np.nan), np.full(k, np.nan), np.full((k, k), np.nan))

    @property
    def vols(self) -> np.ndarray:
        """sigma_k, shape (K,), decimal per period."""
        return np.sqrt(self.variances)

    @property
    def durations(self) -> np.ndarray:
        """Expected duration of each regime in periods, 1 / (1 - p_kk), shape (K,)."""
        with np.errstate(divide="ignore"):
            return 1.0 / (1.0 - np.diag(self.transition))

    @property
    def stationary(self) -> np.ndarray:
        """Ergodic regime distribution pi with pi @ transition = pi, shape (K,)."""
        return stationary_distribution(self.transition)

    def to_dict(self) -> dict:
        return {
            "k_regimes": self.k_regimes,
            "means": self.means.tolist(),
            "variances": self.variances.tolist(),
            "transition": self.transition.tolist(),
            "convention": self.convention,
        }

    @classmethod
    def from_dict(cls, d: dict) -> "RegimeParams":
        return cls(
            int(d["k_regimes"]),
            np.asarray(d["means"], float),
            np.asarray(d["variances"], float),
            np.asarray(d["transition"], float),
            d.get("convention", TRANSITION_CONVENTION),
        )


@dataclass(frozen=True, eq=False)
class RegimeFilterState:
    """Where a forward filter stopped, enough to resume on new rows.

    Attributes
    ----------
    predicted : ndarray, shape (K,)
        P(S of the next row | rows filtered so far). The recursion needs only this.
    filtered : ndarray, shape (K,)
        P(S of the last row | rows filtered so far); NaN before any row.
    n_obs : int
        Rows filtered so far.
    loglik : float
        Cumulative log-likelihood of those rows (units of the data filtered).
    """

    predicted: np.ndarray
    filtered: np.ndarray
    n_obs: int = 0
    loglik: float = 0.0

    def __post_init__(self):
        object.__setattr__(self, "predicted", _frozen(self.predicted, 1))
        object.__setattr__(self, "filtered", _frozen(self.filtered, 1))
        object.__setattr__(self, "n_obs", int(self.n_obs))
        object.__setattr__(self, "loglik", float(self.loglik))
        if self.filtered.shape != self.predicted.shape:
            raise ValueError("filtered and predicted must have the same shape")

    @property
    def k_regimes(self) -> int:
        return self.predicted.shape[0]

    @classmethod
    def start(cls, predicted) -> "RegimeFilterState":
        """State before the first row, with P(S_0) = ``predicted``."""
        p = np.asarray(predicted, float)
        return cls(p, np.full(p.shape, np.nan), 0, 0.0)

    def to_dict(self) -> dict:
        return {
            "predicted": self.predicted.tolist(),
            # NaN is not JSON: an unfiltered state stores None.
            "filtered": None if np.isnan(self.filtered).any() else self.filtered.tolist(),
            "n_obs": self.n_obs,
            "loglik": self.loglik,
        }

    @classmethod
    def from_dict(cls, d: dict) -> "RegimeFilterState":
        pred = np.asarray(d["predicted"], float)
        filt = d.get("filtered")
        filt = np.full(pred.shape, np.nan) if filt is None else np.asarray(filt, float)
        return cls(pred, filt, int(d["n_obs"]), float(d["loglik"]))


@dataclass(frozen=True, eq=False)
class RegimeFiltered:
    """Real-time regime probabilities for a block of rows.

    Attributes
    ----------
    filtered : ndarray, shape (T, K)
        P(S_t = k | data to t).
    predicted : ndarray, shape (T, K)
        P(S_{t+1} = k | data to t) = filtered[t] @ transition.
    loglik_t : ndarray, shape (T,)
        log f(y_t | data to t-1); 0 for missing rows.
    loglik : float
        Sum of ``loglik_t`` over these rows (not cumulative; see ``state.loglik``).
    state : RegimeFilterState
        State after the last row; pass it to the next call.
    """

    filtered: np.ndarray
    predicted: np.ndarray
    loglik_t: np.ndarray
    loglik: float
    state: RegimeFilterState

    @property
    def most_likely(self) -> np.ndarray:
        """argmax_k filtered[t, k], shape (T,)."""
        return np.argmax(self.filtered, axis=1)


@dataclass(frozen=True, eq=False)
class RegimeFit:
    """Result of :meth:`MarkovRegimeModel.fit`.

    On any status other than 'ok' the numeric fields are NaN, ``filtered`` is None
    and ``message`` says why in plain words.

    Attributes
    ----------
    status, message : str
    k_regimes, n_obs : int
    params : RegimeParams
        Ordered regimes (0 = calmest), decimal units.
    loglik : float
        Log-likelihood of the decimal returns at ``params``.
    bic : float
        -2 loglik + k log T with k = K(K-1) + 2K free parameters.
    converged : bool
        The optimizer of the kept start converged.
    n_starts : int
        Starting points screened.
    start_logliks : tuple of float
        Log-likelihood (decimal units) each start reached after its search/EM stage.
    durations : ndarray, shape (K,)
        Expected regime durations 1 / (1 - p_kk), periods.
    regime_share : ndarray, shape (K,)
        Average filtered probability of each regime over the sample.
    order : tuple of int
        ``order[k]`` is statsmodels' raw regime index reported as regime k.
    previous_match : tuple of int or None
        With a previous fit: ``previous_match[k]`` is the previous regime that regime k
        resembles most (identity = labels kept their meaning).
    filtered : RegimeFiltered or None
        Forward filter over the fit sample from the stationary distribution.
    warnings : tuple of str
    """

    status: str
    message: str
    k_regimes: int
    n_obs: int
    params: RegimeParams
    loglik: float = np.nan
    bic: float = np.nan
    converged: bool = False
    n_starts: int = 0
    start_logliks: tuple = ()
    durations: np.ndarray = field(default_factory=lambda: np.array([]))
    regime_share: np.ndarray = field(default_factory=lambda: np.array([]))
    order: tuple = ()
    previous_match: tuple | None = None
    filtered: RegimeFiltered | None = None
    warnings: tuple = ()

    @property
    def ok(self) -> bool:
        return self.status == "ok"


# ----------------------------------------------------------------------------
# Forward (Hamilton) filter kernels
# ----------------------------------------------------------------------------
def stationary_distribution(transition) -> np.ndarray:
    """Ergodic distribution pi of a row-stochastic matrix, shape (K,).

    Solves pi (I - P) = 0 with sum(pi) = 1 by least squares, as statsmodels'
    steady-state initialization does.
    """
    p = np.asarray(transition, float)
    k = p.shape[0]
    a = np.vstack([(np.eye(k) - p).T, np.ones((1, k))])
    b = np.zeros(k + 1)
    b[-1] = 1.0
    pi = np.linalg.lstsq(a, b, rcond=None)[0]
    pi = np.clip(pi, 0.0, None)
    return pi / pi.sum()


def normal_logpdf_matrix(y, means, variances) -> np.ndarray:
    """log N(y_t; mu_k, sigma_k^2) for every row and regime, shape (T, K).

    Rows where y_t is NaN get 0 in every regime: a missing observation carries no
    information, so the filter only applies the transition there.
    """
    y = np.asarray(y, float)
    m = np.asarray(means, float)
    v = np.asarray(variances, float)
    r = y[:, None] - m[None, :]
    out = -0.5 * ((_LOG_2PI + np.log(v))[None, :] + r * r / v[None, :])
    out[np.isnan(y)] = 0.0
    return out


def _priors_loop(lik, transition, predicted0):
    t_len, k = lik.shape
    prior = np.empty((t_len + 1, k))
    p = np.asarray(predicted0, float)
    prior[0] = p
    for t in range(t_len):
        w = p * lik[t]
        p = (w / w.sum()) @ transition
        prior[t + 1] = p
    return prior


def _priors_blocked(lik, transition, predicted0):
    """prior[t] = P(S_t | y_0..y_{t-1}) for t = 0..T, shape (T+1, K).

    Unnormalised, prior_{t+1} = predicted0 G_0 G_1 ... G_t with G_t = diag(lik_t) P,
    a product of positive matrices, so it can be evaluated in blocks: prefix products
    inside each block are vectorised across blocks, and only the sqrt(T) block ends
    run sequentially. Every product is rescaled (the scale cancels on normalising);
    products of positive matrices have no cancellation, so this agrees with the plain
    recursion to rounding.
    """
    t_len, k = lik.shape
    b = max(8, int(math.sqrt(t_len)))
    nb = -(-t_len // b)
    g = np.empty((nb * b, k, k))
    g[:t_len] = lik[:, :, None] * transition[None, :, :]
    g[t_len:] = np.eye(k)
    g = g.reshape(nb, b, k, k)
    pref = np.empty_like(g)
    cur = g[:, 0] / g[:, 0].max(axis=(1, 2), keepdims=True)
    pref[:, 0] = cur
    for j in range(1, b):
        cur = np.matmul(cur, g[:, j])
        cur /= cur.max(axis=(1, 2), keepdims=True)
        pref[:, j] = cur
    starts = np.empty((nb, k))
    v = np.asarray(predicted0, float)
    ends = pref[:, -1]
    for i in range(nb):
        starts[i] = v
        w = v @ ends[i]
        v = w / w.sum()
    q = np.einsum("bk,bjkl->bjl", starts, pref).reshape(nb * b, k)[:t_len]
    prior = np.empty((t_len + 1, k))
    prior[0] = predicted0
    prior[1:] = q / q.sum(axis=1, keepdims=True)
    return prior


def _filter_outputs(log_dens, transition, predicted0, prior_fn):
    log_dens = np.asarray(log_dens, float)
    transition = np.asarray(transition, float)
    predicted0 = np.asarray(predicted0, float)
    t_len, k = log_dens.shape
    if t_len == 0:
        return np.empty((0, k)), np.empty((0, k)), np.empty(0)
    mx = log_dens.max(axis=1)
    with np.errstate(invalid="ignore", over="ignore"):
        lik = np.exp(log_dens - mx[:, None])
    prior = prior_fn(lik, transition, predicted0)[:-1]
    joint = prior * lik
    c = joint.sum(axis=1)
    with np.errstate(divide="ignore", invalid="ignore"):
        filtered = joint / c[:, None]
        loglik_t = np.log(c) + mx
    return filtered, filtered @ transition, loglik_t


def forward_filter(log_dens, transition, predicted0):
    """Forward filter of a hidden Markov chain from per-regime log densities.

    This is the Hamilton (1989) filter; the market-regime HMM uses it too.

    Parameters
    ----------
    log_dens : ndarray, shape (T, K)
        log f(y_t | S_t = k).
    transition : ndarray, shape (K, K)
        Row-stochastic transition matrix.
    predicted0 : ndarray, shape (K,)
        P(S_0) before the first row.

    Returns
    -------
    filtered : ndarray, shape (T, K)
        P(S_t | y_0..y_t).
    predicted : ndarray, shape (T, K)
        P(S_{t+1} | y_0..y_t).
    loglik_t : ndarray, shape (T,)
        log f(y_t | y_0..y_{t-1}).
    """
    t_len = np.shape(log_dens)[0]
    prior_fn = _priors_loop if t_len <= _SMALL_T else _priors_blocked
    return _filter_outputs(log_dens, transition, predicted0, prior_fn)


def forward_filter_loop(log_dens, transition, predicted0):
    """Plain one-row-at-a-time twin of :func:`forward_filter` (reference for tests)."""
    return _filter_outputs(log_dens, transition, predicted0, _priors_loop)


def filter_from_log_densities(log_dens, transition, state: RegimeFilterState) -> RegimeFiltered:
    """Run :func:`forward_filter` from a saved state and return the new state too."""
    filtered, predicted, loglik_t = forward_filter(log_dens, transition, state.predicted)
    total = float(loglik_t.sum())
    if len(loglik_t):
        new_state = RegimeFilterState(
            predicted[-1], filtered[-1], state.n_obs + len(loglik_t), state.loglik + total
        )
    else:
        new_state = state
    return RegimeFiltered(filtered, predicted, loglik_t, total, new_state)


def hamilton_filter(returns, params: RegimeParams,
                    state: RegimeFilterState | None = None) -> RegimeFiltered:
    """Filter rows at fixed parameters, in time proportional to the rows.

    Parameters
    ----------
    returns : array_like, shape (T,)
        Returns in the units of ``params`` (decimal for fitted params). NaN rows are
        treated as missing (transition only, log-likelihood 0).
    params : RegimeParams
    state : RegimeFilterState, optional
        Saved state from the previous call; default starts from the stationary
        distribution (statsmodels' default steady-state initialization).
    """
    y = np.asarray(returns, float).ravel()
    if state is None:
        state = RegimeFilterState.start(params.stationary)
    if state.k_regimes != params.k_regimes:
        raise ValueError("state and params have different numbers of regimes")
    log_dens = normal_logpdf_matrix(y, params.means, params.variances)
    return filter_from_log_densities(log_dens, params.transition, state)


# ----------------------------------------------------------------------------
# statsmodels helpers: parameter vectors, multi-start fitting
# ----------------------------------------------------------------------------
def regime_moments(model, params):
    """Regime means, variances and row-stochastic transition from a statsmodels vector.

    Works for ``MarkovRegression`` and ``MarkovAutoregression`` with ``trend='c'``
    (the first switching coefficient is the regime mean). Units are the model's.

    Returns
    -------
    means : ndarray, shape (K,)
    variances : ndarray, shape (K,)
    transition : ndarray, shape (K, K), row-stochastic
    """
    params = np.asarray(params, float)
    k = model.k_regimes
    means = np.array([params[model.parameters[i, "exog"]][0] for i in range(k)])
    variances = np.array([params[model.parameters[i, "variance"]][0] for i in range(k)])
    transition = model.regime_transition_matrix(params)[:, :, 0].T
    return means, variances, transition


def regression_param_vector(model, means, variances, transition) -> np.ndarray:
    """Inverse of :func:`regime_moments` for a ``MarkovRegression`` (trend 'c', no exog)."""
    k = model.k_regimes
    p = np.zeros(model.k_params)
    # statsmodels stores P(j -> i) for i < K-1, row i of the column-stochastic matrix.
    p[model.parameters["regime_transition"]] = np.asarray(transition, float).T[:-1].ravel()
    for i in range(k):
        p[model.parameters[i, "exog"]] = means[i]
        p[model.parameters[i, "variance"]] = variances[i]
    return p


@dataclass(frozen=True, eq=False)
class BestOfFit:
    """Outcome of :func:`fit_best_of`, in the model's own units.

    Attributes
    ----------
    params : ndarray or None
        Best constrained parameter vector (None if every start failed).
    llf : float
    converged : bool
    start_llfs : tuple of float
        llf after the search/EM stage, one per start (-inf for a start that failed).
    polished_llfs : tuple of float
        llf after BFGS for each polished start.
    message : str
        Optimizer outcome of the kept start, or why nothing was kept.
    admissible : bool
        False when every polished result failed the ``admissible`` test and the best
        inadmissible one was kept.
    n_degenerate : int
        Starts whose search/EM stage ended at a non-finite likelihood (typically a
        variance collapsed to zero on repeated values).
    """

    params: np.ndarray | None
    llf: float
    converged: bool
    start_llfs: tuple
    polished_llfs: tuple
    message: str
    admissible: bool = True
    n_degenerate: int = 0


def _optimizer_converged(retvals, gtol_fallback):
    if retvals is None:
        return False, "optimizer returned no diagnostics"
    if retvals.get("converged", False):
        return True, "optimizer converged"
    # BFGS often stops with 'precision loss' at the optimum of a noisy likelihood; accept
    # that when the gradient of the average log-likelihood is already negligible.
    gopt = retvals.get("gopt")
    if gopt is not None and np.all(np.isfinite(gopt)) and np.max(np.abs(gopt)) < gtol_fallback:
        return True, "optimizer stopped with a negligible gradient"
    return False, f"optimizer stopped early (warnflag {retvals.get('warnflag')})"


def fit_best_of(
    model,
    starts,
    rng: np.random.Generator,
    *,
    search_reps: int = 4,
    search_iter: int = 5,
    em_iter: int = 20,
    n_polish: int | None = None,
    maxiter: int = 200,
    gtol_fallback: float = 1e-4,
    admissible=None,
) -> BestOfFit:
    """Multi-start maximum likelihood for any statsmodels Markov-switching model.

    Each start (a constrained parameter vector, or None for the model's own default)
    is screened with statsmodels' random search around it (``search_reps`` draws from
    ``rng``, ``search_iter`` EM steps each) plus ``em_iter`` EM steps; the ``n_polish``
    best screened points (default: all) are then optimised by BFGS (``maxiter``), and
    the highest likelihood is kept. BFGS with complex-step gradients dominates the
    cost; the 20 EM steps before it cut its gradient calls several-fold (K=2,
    T=15,000: 28 -> 7). Polishing only the best screened point is cheaper but not safe: on
    Hamilton's GNP data a start that screens best ends in a local optimum with an
    outlier regime (log-likelihood -182.50 instead of -181.26).

    Parameters
    ----------
    model : MarkovRegression or MarkovAutoregression
    starts : sequence of (ndarray or None)
    rng : numpy.random.Generator
        Seeded; consumed in order, so results replay exactly.
    admissible : callable, optional
        ``admissible(params) -> bool``. Inadmissible optima (for example a regime whose
        variance collapsed onto a few identical values, where the likelihood is
        unbounded) lose to any admissible one whatever their likelihood.
    """
    start_llfs, screened, n_degenerate = [], [], 0
    for s in starts:
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                p = model.fit(
                    start_params=s, search_reps=search_reps, search_iter=search_iter,
                    em_iter=em_iter, rng=rng, maxiter=0, return_params=True, disp=0,
                )
                llf = float(model.loglike(p))
        except Exception:  # a bad start must not sink the other starts
            p, llf = None, -np.inf
        if not np.isfinite(llf):
            n_degenerate += p is not None
            p, llf = None, -np.inf
        start_llfs.append(llf)
        screened.append(p)
    ranked = [i for i in np.argsort(start_llfs)[::-1] if screened[i] is not None]
    if not ranked:
        msg = "every start failed"
        if n_degenerate:
            msg += (f"; at {n_degenerate} of them the likelihood became non-finite (a "
                    "regime variance collapsed to zero)")
        return BestOfFit(None, np.nan, False, tuple(start_llfs), (), msg, False, n_degenerate)
    best, best_bad = None, None
    polished = []
    for i in ranked[: len(ranked) if n_polish is None else max(1, n_polish)]:
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                res = model.fit(
                    start_params=screened[i], em_iter=0, search_reps=0, maxiter=maxiter,
                    cov_type="none", disp=0,
                )
            llf = float(res.llf)
            conv, msg = _optimizer_converged(getattr(res, "mle_retvals", None), gtol_fallback)
            cand = (llf, np.asarray(res.params, float), conv, msg)
        except Exception as exc:
            cand = (-np.inf, None, False, f"optimizer failed: {exc}")
        polished.append(cand[0])
        if cand[1] is None or not np.isfinite(cand[0]):
            continue
        if admissible is None or admissible(cand[1]):
            if best is None or cand[0] > best[0]:
                best = cand
        elif best_bad is None or cand[0] > best_bad[0]:
            best_bad = cand
    ok = best is not None
    best = best if ok else best_bad
    if best is None:
        return BestOfFit(None, np.nan, False, tuple(start_llfs), tuple(polished),
                         "the optimizer failed from every polished start")
    return BestOfFit(best[1], best[0], best[2], tuple(start_llfs), tuple(polished), best[3], ok,
                     n_degenerate)


# ----------------------------------------------------------------------------
# Regime ordering and label stability
# ----------------------------------------------------------------------------
def order_regimes(vol_key, mean_key, distance=None, tie_ratio: float = 1.05):
    """Order regimes calmest first, keeping labels stable across refits.

    Rule: sort by ``vol_key`` ascending. Regimes whose volatilities are within a
    factor ``tie_ratio`` of their neighbour form a tie group (volatility cannot tell
    them apart); inside a group, if ``distance`` to the previous fit is given, members
    take the previous labels that minimise the total distance, otherwise higher
    ``mean_key`` comes first.

    Parameters
    ----------
    vol_key, mean_key : ndarray, shape (K,)
        Volatility and mean summary of each raw regime.
    distance : ndarray, shape (K, K), optional
        ``distance[i, j]`` between raw regime i and previous regime j (label j).
    tie_ratio : float

    Returns
    -------
    order : tuple of int
        ``order[k]`` = raw index reported as regime k.
    previous_match : tuple of int or None
        For each reported regime, the previous label it is closest to under the best
        one-to-one assignment (None without ``distance``).
    """
    vol_key = np.asarray(vol_key, float)
    mean_key = np.asarray(mean_key, float)
    k = len(vol_key)
    base = list(np.lexsort((-mean_key, vol_key)))
    groups, cur = [], [0]
    for pos in range(1, k):
        if vol_key[base[pos]] <= vol_key[base[pos - 1]] * tie_ratio:
            cur.append(pos)
        else:
            groups.append(cur)
            cur = [pos]
    groups.append(cur)
    order = list(base)
    if distance is not None:
        distance = np.asarray(distance, float)
    for g in groups:
        if len(g) < 2:
            continue
        members = [base[pos] for pos in g]
        if distance is None:
            best = sorted(members, key=lambda raw: (-mean_key[raw], vol_key[raw]))
        else:
            best = min(
                itertools.permutations(members),
                key=lambda perm: sum(distance[raw, pos] for raw, pos in zip(perm, g)),
            )
        for raw, pos in zip(best, g):
            order[pos] = raw
    match = None
    if distance is not None:
        d = distance[order]
        perm = min(itertools.permutations(range(d.shape[1]), k),
                   key=lambda p: sum(d[i, p[i]] for i in range(k)))
        match = tuple(int(j) for j in perm)
    return tuple(int(i) for i in order), match


def regime_distance(means, variances, prev: RegimeParams) -> np.ndarray:
    """Distance between raw regimes and a previous fit's regimes, shape (K, K_prev).

    |log(sigma_i / sigma_j)| + |mu_i - mu_j| / pooled previous sigma: scale-free, and
    equally sensitive to a doubling of volatility and a one-sigma move in the mean.
    """
    vol = np.sqrt(np.asarray(variances, float))
    pooled = math.sqrt(float(np.mean(prev.variances)))
    dv = np.abs(np.log(vol[:, None] / prev.vols[None, :]))
    dm = np.abs(np.asarray(means, float)[:, None] - prev.means[None, :]) / pooled
    return dv + dm


# ----------------------------------------------------------------------------
# Estimator
# ----------------------------------------------------------------------------
class MarkovRegimeModel:
    """Markov-switching mean and variance for one factor (Hamilton 1989).

    Parameters
    ----------
    k_regimes : int
        2 (default) or 3.
    n_starts : int
        Starting points of a cold fit: statsmodels' default start, then seeded random
        starts.
    warm_starts : int
        Starting points of a warm refit (``fit(..., previous=p)``): the previous
        parameters first, then the cold-fit starts. Default 1: a refit trusts the
        previous optimum's basin (searched around with ``search_reps``); use
        ``warm_start=False`` now and then for a full multi-start refit.
    engine : {"em", "statsmodels"}
        "em" (default, two regimes): :func:`tracker.estimation.regime_em.fit_em`, an
        accelerated EM batched over the starts, each run to convergence; a warm refit
        then uses the previous parameters *and* statsmodels' default start. With
        "statsmodels" (and always for three regimes) every start goes through
        :func:`fit_best_of` (random search, EM steps, BFGS). The two reach the same
        optimum (tests/estimation/test_regime_em.py); EM is several times faster.
    search_reps, search_iter, em_iter, n_polish, maxiter : int
        See :func:`fit_best_of`. For the EM engine ``maxiter`` caps its cycles (three E
        steps each).
    seed : int
        Seed of the numpy Generator created at each ``fit`` (fits replay exactly).
    min_obs : int, optional
        Fewer rows give 'too_little_data'; default 20 per free parameter.
    min_regime_share, min_regime_obs : float
        A regime whose average filtered probability is below ``min_regime_share`` or
        whose expected number of rows is below ``min_regime_obs`` is 'unidentified'.
    min_variance_ratio : float
        A regime variance below this fraction of the sample variance is degenerate
        (typically stale, repeated values that make the likelihood unbounded).
    require_bic_gain : bool
        If True, a fit whose BIC does not beat a single normal distribution is
        'unidentified' (the data show no regime structure).
    vol_tie_ratio : float
        See :func:`order_regimes`.
    max_repeat_share : float
        If one exact value (typically 0.0 from stale or filled prices) makes up at least
        this share of rows, the fit is 'unidentified' before any optimisation: a regime
        would collapse onto it with unbounded likelihood.
    """

    def __init__(self, k_regimes: int = 2, *, n_starts: int = 3, warm_starts: int = 1,
                 search_reps: int = 4,
                 search_iter: int = 5, em_iter: int = 20, n_polish: int | None = None,
                 maxiter: int = 200, seed: int = 0, min_obs: int | None = None,
                 min_regime_share: float = 0.01, min_regime_obs: float = 10.0,
                 min_variance_ratio: float = 1e-4, require_bic_gain: bool = True,
                 vol_tie_ratio: float = 1.05, max_repeat_share: float = 0.05,
                 engine: str = "em"):
        if engine not in ("em", "statsmodels"):
            raise ValueError("engine must be 'em' or 'statsmodels'")
        self.engine = engine
        if k_regimes not in (2, 3):
            raise ValueError("k_regimes must be 2 or 3")
        if n_starts < 1 or (n_polish is not None and n_polish < 1):
            raise ValueError("n_starts and n_polish must be at least 1")
        self.k_regimes = int(k_regimes)
        self.n_starts = int(n_starts)
        self.warm_starts = max(1, int(warm_starts))
        self.search_reps = int(search_reps)
        self.search_iter = int(search_iter)
        self.em_iter = int(em_iter)
        self.n_polish = None if n_polish is None else int(n_polish)
        self.maxiter = int(maxiter)
        self.seed = int(seed)
        self.n_params = self.k_regimes * (self.k_regimes - 1) + 2 * self.k_regimes
        self.min_obs = int(min_obs) if min_obs is not None else 20 * self.n_params
        self.min_regime_share = float(min_regime_share)
        self.min_regime_obs = float(min_regime_obs)
        self.min_variance_ratio = float(min_variance_ratio)
        self.require_bic_gain = bool(require_bic_gain)
        self.vol_tie_ratio = float(vol_tie_ratio)
        self.max_repeat_share = float(max_repeat_share)

    # -- fixed-parameter path -------------------------------------------------
    @staticmethod
    def filter(returns, params: RegimeParams,
               state: RegimeFilterState | None = None) -> RegimeFiltered:
        """Filter new rows at given parameters from a saved state (see :func:`hamilton_filter`)."""
        return hamilton_filter(returns, params, state)

    # -- estimation -----------------------------------------------------------
    def _failure(self, status, message, n_obs, **extra) -> RegimeFit:
        k = self.k_regimes
        return RegimeFit(status, message, k, n_obs, RegimeParams.nan(k),
                         durations=np.full(k, np.nan), regime_share=np.full(k, np.nan), **extra)

    def _starts(self, model, y_pct, rng, warm):
        k = self.k_regimes
        starts, wanted = [None], self.n_starts
        if warm is not None:
            starts = [regression_param_vector(
                model, warm.means * PERCENT, warm.variances * PERCENT**2, warm.transition),
                None]
            wanted = self.warm_starts + (1 if self._uses_em() else 0)
        var, mean, sd = float(np.var(y_pct)), float(np.mean(y_pct)), float(np.std(y_pct))
        while len(starts) < wanted:
            variances = var * np.sort(np.exp(rng.uniform(math.log(0.2), math.log(3.0), k)))
            means = mean + 0.1 * sd * rng.standard_normal(k)
            stay = rng.uniform(0.85, 0.99, k)
            trans = np.tile(((1 - stay) / (k - 1))[:, None], (1, k))
            np.fill_diagonal(trans, stay)
            starts.append(regression_param_vector(model, means, variances, trans))
        return starts[:wanted]

    def _uses_em(self) -> bool:
        return self.engine == "em" and self.k_regimes == 2

    def _fit_em(self, model, y_pct, starts, floor_pct) -> BestOfFit:
        """The EM engine on every start at once, reported like :func:`fit_best_of`."""
        from tracker.estimation.regime_em import fit_em

        moments = [regime_moments(model, model.start_params if st is None else st) for st in starts]
        means = np.array([m[0] for m in moments])
        variances = np.array([m[1] for m in moments])
        trans = np.array([m[2] for m in moments])
        with np.errstate(all="ignore"):
            res = fit_em(y_pct, means, np.maximum(variances, floor_pct), trans,
                         max_iter=3 * self.maxiter, variance_floor=floor_pct)
        lls = tuple(float(v) if np.isfinite(v) else -np.inf for v in res.loglik)
        good = [i for i in range(len(starts)) if res.converged[i] and not res.degenerate[i]]
        n_degenerate = int(np.sum(res.degenerate))
        alive = [i for i in range(len(starts)) if not res.degenerate[i] and np.isfinite(res.loglik[i])]
        if good:
            i = max(good, key=lambda j: res.loglik[j])
            top = max(alive, key=lambda j: res.loglik[j])
            if res.loglik[top] > res.loglik[i] + 1e-8 * max(abs(res.loglik[i]), len(y_pct)):
                # a start still climbing is already above every converged one: the
                # converged optimum is not the best one found
                vec = regression_param_vector(model, res.means[top], res.variances[top], res.transition[top])
                return BestOfFit(vec, float(res.loglik[top]), False, lls, lls,
                                 f"EM did not converge in {3 * self.maxiter} E steps from the start "
                                 "with the highest likelihood", True, n_degenerate)
            vec = regression_param_vector(model, res.means[i], res.variances[i], res.transition[i])
            return BestOfFit(vec, float(res.loglik[i]), True, lls, lls,
                             f"EM converged in {int(res.n_iter[i])} E steps", True, n_degenerate)
        if not alive:
            msg = "every start failed"
            if n_degenerate:
                msg += (f"; at {n_degenerate} of them a regime variance collapsed to its "
                        "floor (the likelihood is unbounded there)")
            return BestOfFit(None, np.nan, False, lls, (), msg, False, n_degenerate)
        i = max(alive, key=lambda j: res.loglik[j])
        vec = regression_param_vector(model, res.means[i], res.variances[i], res.transition[i])
        return BestOfFit(vec, float(res.loglik[i]), False, lls, lls,
                         f"EM did not converge in {3 * self.maxiter} E steps", True, n_degenerate)

    def fit(self, returns, previous: RegimeParams | None = None,
            warm_start: bool = True) -> RegimeFit:
        """Estimate the model on a return series.

        Parameters
        ----------
        returns : array_like, shape (T,)
            Decimal returns per period, finite.
        previous : RegimeParams, optional
            Last fit's parameters: keeps labels stable and, with ``warm_start``, is the
            first starting point (``warm_starts`` starts instead of ``n_starts``).
        warm_start : bool
            False: a cold multi-start fit; ``previous`` is then used only for labels.
        """
        y = np.asarray(returns, float).ravel()
        t_len, k = len(y), self.k_regimes
        if t_len < self.min_obs:
            return self._failure("too_little_data",
                                 f"{t_len} rows; at least {self.min_obs} are needed for "
                                 f"{k} regimes", t_len)
        if not np.all(np.isfinite(y)):
            return self._failure("failed", "returns contain NaN or infinite values; "
                                 "fit needs a complete series", t_len)
        if np.var(y) <= 0:
            return self._failure("unidentified", "the series is constant", t_len)
        values, counts = np.unique(y, return_counts=True)
        top = int(np.argmax(counts))
        if counts[top] >= self.max_repeat_share * t_len:
            return self._failure(
                "unidentified", f"{counts[top] / t_len:.0%} of rows equal {values[top]:g} "
                "(stale or filled data?); a regime would collapse onto that value", t_len)

        y_pct = y * PERCENT
        model = MarkovRegression(y_pct, k_regimes=k, trend="c", switching_variance=True)
        rng = np.random.default_rng(self.seed)
        prev = previous if (previous is not None and previous.k_regimes == k
                            and np.all(np.isfinite(previous.variances))
                            and np.all(np.isfinite(previous.means))) else None
        starts = self._starts(model, y_pct, rng, prev if warm_start else None)
        floor_pct = self.min_variance_ratio * float(np.var(y_pct))

        def admissible(p):
            return bool(np.all(regime_moments(model, p)[1] >= floor_pct))

        if self._uses_em():
            best = self._fit_em(model, y_pct, starts, floor_pct)
        else:
            best = fit_best_of(model, starts, rng, search_reps=self.search_reps,
                               search_iter=self.search_iter, em_iter=self.em_iter,
                               n_polish=self.n_polish, maxiter=self.maxiter,
                               admissible=admissible)
        unit_shift = t_len * math.log(PERCENT)  # log f_decimal = log f_percent + log(100)
        start_lls = tuple(ll + unit_shift if np.isfinite(ll) else ll for ll in best.start_llfs)
        common = dict(n_starts=len(starts), start_logliks=start_lls)
        if best.params is None:
            if best.n_degenerate:
                return self._failure(
                    "unidentified", "a regime variance collapsed to zero at every start; "
                    "repeated or stale values make the likelihood unbounded", t_len, **common)
            return self._failure("failed", best.message, t_len, **common)

        means_pct, var_pct, trans = regime_moments(model, best.params)
        dist = None
        if prev is not None:
            dist = regime_distance(means_pct / PERCENT, var_pct / PERCENT**2, prev)
        order, match = order_regimes(np.sqrt(var_pct), means_pct, dist, self.vol_tie_ratio)
        o = list(order)
        params = RegimeParams(k, means_pct[o] / PERCENT, var_pct[o] / PERCENT**2,
                              trans[np.ix_(o, o)])

        # A collapsed variance explains a failed optimisation better than the optimizer
        # status does (the likelihood is unbounded there), so it is checked first.
        problem = self._identification_problem(y, params)
        if problem is not None:
            return self._failure("unidentified", problem, t_len, **common)
        if not best.converged:
            return self._failure(
                "not_converged",
                f"{best.message}; best log-likelihood {best.llf + unit_shift:.2f} "
                f"(iteration limit {self.maxiter})", t_len, **common)
        filt = hamilton_filter(y, params)
        share = filt.filtered.mean(axis=0)
        problem = self._weight_problem(share, t_len, filt.loglik, y)
        if problem is not None:
            return self._failure("unidentified", problem, t_len, **common)

        notes = []
        if match is not None and tuple(match) != tuple(range(k)):
            pairs = ", ".join(f"{i}->{j}" for i, j in enumerate(match) if i != j)
            notes.append("regime meanings changed since the previous fit (new regime -> "
                         f"closest previous regime: {pairs})")
        bic = -2.0 * filt.loglik + self.n_params * math.log(t_len)
        return RegimeFit(
            "ok", "ok", k, t_len, params, loglik=filt.loglik, bic=bic, converged=True,
            durations=params.durations, regime_share=share, order=order,
            previous_match=match, filtered=filt, warnings=tuple(notes), **common)

    def _identification_problem(self, y, params):
        if not (np.all(np.isfinite(params.means)) and np.all(np.isfinite(params.variances))
                and np.all(np.isfinite(params.transition))):
            return "the optimizer ended at non-finite parameters"
        floor = self.min_variance_ratio * float(np.var(y))
        low = np.flatnonzero(params.variances < floor)
        if low.size:
            return (f"regime {int(low[0])} has a degenerate variance "
                    f"({params.variances[low[0]]:.3g}); repeated or stale values make "
                    "the likelihood unbounded")
        vols = params.vols
        for i, j in itertools.combinations(range(params.k_regimes), 2):
            if (abs(math.log(vols[i] / vols[j])) < 0.05
                    and abs(params.means[i] - params.means[j]) < 0.05 * min(vols[i], vols[j])):
                return f"regimes {i} and {j} describe the same distribution"
        return None

    def _weight_problem(self, share, t_len, loglik, y):
        for i, s in enumerate(share):
            if s < self.min_regime_share or s * t_len < self.min_regime_obs:
                return (f"regime {i} has almost no weight (average probability {s:.4f}, "
                        f"about {s * t_len:.1f} rows)")
        if self.require_bic_gain:
            var = float(np.var(y))
            ll_one = -0.5 * t_len * (_LOG_2PI + math.log(var) + 1.0)
            bic_k = -2.0 * loglik + self.n_params * math.log(t_len)
            bic_one = -2.0 * ll_one + 2 * math.log(t_len)
            if bic_k >= bic_one:
                return ("flat likelihood: the regime model does not beat a single normal "
                        f"distribution on BIC ({bic_k:.1f} vs {bic_one:.1f})")
        return None
