"""Baum-Welch EM for a Gaussian hidden Markov model, compiled for long histories.

The market regime (:mod:`tracker.estimation.market_regime`) fits nine Gaussian HMMs on a
cold refit (2 to 4 states, three starts each). hmmlearn's ``GaussianHMM.fit`` spends about
15 ms per EM iteration on 6,500 rows of 10 factors, 6 ms of it in one three-operand
``einsum`` for the full covariances and most of the rest in log-space passes, so a cold
market fit took 8-9 s, more than all factor fits of a 10-factor store together.

This module runs the same algorithm with the same update rules (hmmlearn 0.3's
``GaussianHMM`` with ``params='stmc'``, ``startprob_prior = transmat_prior = 1``,
``means_weight = 0``, ``covars_weight = 1`` and its ``covars_prior``):

* E step: the scaled forward-backward recursion (each row's densities divided by their
  largest entry, forward probabilities normalised every row, the backward pass divided by
  the same row constants), one compiled pass (:mod:`tracker.estimation.jit`);
* M step: posterior-weighted sums as matrix products;
* stopping: hmmlearn's rule, the M step first, then stop once the log-likelihood rose by
  less than ``tol`` or ``n_iter`` iterations ran. The final parameters are those after
  the last M step, as hmmlearn's.

About 1 ms per iteration for the same data. hmmlearn itself is the reference twin
(tests/estimation/test_gaussian_hmm.py: one-step updates, posteriors and the converged
optimum from the same start) and the engine for short histories (fewer than
``jit.MIN_ROWS`` rows, where compiling would cost more than it saves) or when numba is
unavailable (:func:`fit`).
"""
from __future__ import annotations

import logging
import math
import warnings
from dataclasses import dataclass

import numpy as np
from scipy.linalg import LinAlgError, cholesky, solve_triangular

from tracker.estimation import jit

_LOG_2PI = math.log(2.0 * math.pi)
# hmmlearn's retry when a covariance is not positive definite (stats.py, min_covar=1e-7)
_CHOLESKY_RETRY = 1e-7


@dataclass(frozen=True, eq=False)
class HmmParams:
    """Gaussian HMM parameters in hmmlearn's layout.

    ``covars`` is (K, N, N) for 'full' and (K, N) for 'diag' (hmmlearn's ``_covars_``);
    ``transmat[i, j] = P(S_{t+1} = j | S_t = i)``.
    """

    startprob: np.ndarray
    transmat: np.ndarray
    means: np.ndarray
    covars: np.ndarray
    covariance_type: str

    @property
    def n_states(self) -> int:
        return self.means.shape[0]

    @property
    def full_covars(self) -> np.ndarray:
        """Covariances as (K, N, N) matrices (hmmlearn's ``covars_``)."""
        return full_covariances(self.covars, self.covariance_type)


def full_covariances(covars, covariance_type: str) -> np.ndarray:
    """``covars`` as (K, N, N) matrices: as they are when 'full', diagonal ones from the
    (K, N) variances when 'diag'."""
    if covariance_type == "full":
        return covars
    return np.einsum("kn,nm->knm", covars, np.eye(covars.shape[1]))


@dataclass(frozen=True, eq=False)
class EmResult:
    """Parameters after the last M step, the log-likelihood before each M step, the
    number of iterations run (hmmlearn's ``monitor_.iter``) and the engine used."""

    params: HmmParams
    history: tuple[float, ...]
    n_iter: int
    engine: str


def log_densities(z, means, covars, covariance_type) -> np.ndarray:
    """log N(z_t; mu_k, Sigma_k), shape (T, K), as hmmlearn computes them (a covariance
    that is not positive definite is retried with 1e-7 on its diagonal).

    Full covariances: with Sigma_k = L_k L_k', the Mahalanobis term is |L_k^{-1}(z_t -
    mu_k)|^2; the K inverse factors are stacked so one matrix product serves every state.
    """
    t_len, n = z.shape
    k = means.shape[0]
    if covariance_type != "full":
        r = z[:, None, :] - means[None, :, :]
        maha = (r * r / covars[None, :, :]).sum(axis=2)
        return -0.5 * (n * _LOG_2PI + np.log(covars).sum(axis=1)[None, :] + maha)
    inv_t = np.empty((n, k * n))
    logdet = np.empty(k)
    eye = np.eye(n)
    for s in range(k):
        try:
            chol = cholesky(covars[s], lower=True, check_finite=False)
        except LinAlgError:
            chol = cholesky(covars[s] + _CHOLESKY_RETRY * eye, lower=True, check_finite=False)
        inv_t[:, s * n:(s + 1) * n] = solve_triangular(chol, eye, lower=True,
                                                       check_finite=False).T
        logdet[s] = 2.0 * np.log(np.diagonal(chol)).sum()
    sol = z @ inv_t                                               # (T, K*N)
    sol -= (means[:, None, :] @ inv_t.reshape(n, k, n).transpose(1, 0, 2)).reshape(1, k * n)
    # sum of squares within each state's block, as a product with the block indicator
    # (a third of the time of a reshaped sum over the short last axis)
    maha = np.square(sol, out=sol) @ np.kron(np.eye(k), np.ones((n, 1)))
    return -0.5 * (n * _LOG_2PI + logdet[None, :] + maha)


def _forward_backward(log_dens, startprob, transmat):
    """Posteriors (T, K), summed pairwise posteriors (K, K) and the log-likelihood.

    Plain Python over floats: compiled by :func:`kernel`, and run as is by the tests.
    """
    t_len, k = log_dens.shape
    lik = np.empty((t_len, k))
    alpha = np.empty((t_len, k))
    post = np.empty((t_len, k))
    scale = np.empty(t_len)
    xi = np.zeros((k, k))
    beta = np.empty(k)
    nxt = np.empty(k)
    pair = np.empty((k, k))
    total = 0.0
    for t in range(t_len):
        mx = -math.inf
        for j in range(k):
            if log_dens[t, j] > mx:
                mx = log_dens[t, j]
        for j in range(k):
            lik[t, j] = math.exp(log_dens[t, j] - mx)
        total += mx
    for t in range(t_len):
        c = 0.0
        for j in range(k):
            if t == 0:
                pr = startprob[j]
            else:
                pr = 0.0
                for i in range(k):
                    pr += alpha[t - 1, i] * transmat[i, j]
            a = pr * lik[t, j]
            alpha[t, j] = a
            c += a
        inv = 1.0 / c
        for j in range(k):
            alpha[t, j] *= inv
        scale[t] = c
        total += math.log(c)
    for j in range(k):
        beta[j] = 1.0
        post[t_len - 1, j] = alpha[t_len - 1, j]
    for t in range(t_len - 2, -1, -1):
        for j in range(k):
            nxt[j] = lik[t + 1, j] * beta[j]
        tot = 0.0
        for i in range(k):
            for j in range(k):
                v = alpha[t, i] * transmat[i, j] * nxt[j]
                pair[i, j] = v
                tot += v
        inv = 1.0 / tot
        for i in range(k):
            for j in range(k):
                xi[i, j] += pair[i, j] * inv
        g_tot = 0.0
        inv = 1.0 / scale[t + 1]
        for i in range(k):
            b = 0.0
            for j in range(k):
                b += transmat[i, j] * nxt[j]
            beta[i] = b * inv
            g = alpha[t, i] * beta[i]
            post[t, i] = g
            g_tot += g
        inv = 1.0 / g_tot
        for i in range(k):
            post[t, i] *= inv
    return post, xi, total


def kernel():
    """The compiled forward-backward pass, or None when numba is not installed."""
    probe = (np.zeros((3, 2)), np.full(2, 0.5), np.full((2, 2), 0.5))
    return jit.compiled(_forward_backward, probe)


def outer_rows(z) -> np.ndarray | None:
    """The upper triangle (i <= j, row-major) of z_t z_t' of every row, shape
    (T, N(N+1)/2), for :func:`m_step`; None when that would take more than 64 MB (many
    columns). The products are symmetric, so the lower half would only double the M
    step's largest product. Filled a row of the triangle at a time (no temporaries the
    size of the result)."""
    t_len, n = z.shape
    if t_len * n * (n + 1) // 2 * 8 > 64 * 2**20:
        return None
    out = np.empty((t_len, n * (n + 1) // 2))
    at = 0
    for r in range(n):
        np.multiply(z[:, r:r + 1], z[:, r:], out=out[:, at:at + n - r])
        at += n - r
    return out


def _symmetric(upper: np.ndarray, n: int) -> np.ndarray:
    """(K, N, N) symmetric matrices from their upper triangles (K, N(N+1)/2)."""
    i, j = np.triu_indices(n)
    full = np.empty((upper.shape[0], n, n))
    full[:, i, j] = upper
    full[:, j, i] = upper
    return full


def m_step(z, post, xi, params: HmmParams, covars_prior: float, zz=None) -> HmmParams:
    """hmmlearn's M step (``GaussianHMM._do_mstep`` with the priors named above).

    ``zz`` is :func:`outer_rows` of ``z``, made once per EM run (full covariances).
    """
    startprob = np.where(params.startprob == 0, 0.0, np.maximum(post[0], 0.0))
    startprob = startprob / startprob.sum()
    transmat = np.where(params.transmat == 0, 0.0, np.maximum(xi, 0.0))
    row = transmat.sum(axis=1, keepdims=True)
    transmat = transmat / np.where(row == 0, 1.0, row)
    weight = post.sum(axis=0)                                    # (K,)
    obs = post.T @ z                                             # (K, N)
    means = obs / weight[:, None]
    if params.covariance_type == "full":
        n, k = z.shape[1], means.shape[0]
        if zz is not None:                                       # sum_t post_tk z_t z_t'
            outer = _symmetric(post.T @ zz, n)
        else:
            outer = np.stack([(z * post[:, s:s + 1]).T @ z for s in range(k)])
        obsmean = obs[:, :, None] * means[:, None, :]
        num = (outer - obsmean - obsmean.transpose(0, 2, 1)
               + means[:, :, None] * means[:, None, :] * weight[:, None, None])
        covars = (covars_prior + num) / weight[:, None, None]    # covars_weight - N < 0 -> 0
    else:
        num = post.T @ (z * z) - 2.0 * means * obs + means ** 2 * weight[:, None]
        covars = (covars_prior + num) / np.maximum(weight[:, None], 1e-5)
    return HmmParams(startprob, transmat, means, covars, params.covariance_type)


def fit_compiled(z, start: HmmParams, *, n_iter: int, tol: float,
                 covars_prior: float) -> EmResult | None:
    """EM from ``start`` with the compiled pass (None when numba is unavailable)."""
    fb = kernel()
    if fb is None:
        return None
    z = np.ascontiguousarray(z, dtype=np.float64)
    params, history = start, []
    zz = outer_rows(z) if start.covariance_type == "full" else None
    for _ in range(n_iter):
        log_dens = log_densities(z, params.means, params.covars, params.covariance_type)
        post, xi, loglik = fb(log_dens, np.ascontiguousarray(params.startprob, dtype=np.float64),
                              np.ascontiguousarray(params.transmat, dtype=np.float64))
        params = m_step(z, post, xi, params, covars_prior, zz)
        history.append(float(loglik))
        if len(history) >= 2 and history[-1] - history[-2] < tol:
            break
    return EmResult(params, tuple(history), len(history), "compiled")


def fit_hmmlearn(z, start: HmmParams, *, n_iter: int, tol: float, covars_prior: float,
                 min_covar: float) -> EmResult:
    """The same EM run by hmmlearn's ``GaussianHMM`` (the reference twin)."""
    from hmmlearn.hmm import GaussianHMM

    hmm = GaussianHMM(n_components=start.n_states, covariance_type=start.covariance_type,
                      n_iter=n_iter, tol=tol, min_covar=min_covar, covars_prior=covars_prior,
                      init_params="", params="stmc")
    hmm.startprob_ = np.array(start.startprob, dtype=float)
    hmm.transmat_ = np.array(start.transmat, dtype=float)
    hmm.means_ = np.array(start.means, dtype=float)
    hmm.covars_ = np.array(start.covars, dtype=float)
    hmm_log = logging.getLogger("hmmlearn")
    level = hmm_log.level
    hmm_log.setLevel(logging.ERROR)  # its "not converging" notes become our statuses
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            hmm.fit(z)
    finally:
        hmm_log.setLevel(level)
    covars = hmm.covars_ if start.covariance_type == "full" else np.diagonal(hmm.covars_, axis1=1, axis2=2)
    params = HmmParams(hmm.startprob_, hmm.transmat_, hmm.means_, np.array(covars),
                       start.covariance_type)
    # hmmlearn keeps only the last two log-likelihoods
    return EmResult(params, tuple(hmm.monitor_.history), int(hmm.monitor_.iter), "hmmlearn")


def fit(z, start: HmmParams, *, n_iter: int, tol: float, covars_prior: float,
        min_covar: float, engine: str = "auto") -> EmResult:
    """EM from ``start``: compiled for ``jit.MIN_ROWS`` rows or more when numba is there
    (``engine='auto'``), else, or with ``engine='hmmlearn'``, by hmmlearn."""
    if engine not in ("auto", "compiled", "hmmlearn"):
        raise ValueError("engine must be 'auto', 'compiled' or 'hmmlearn'")
    z = np.asarray(z, dtype=float)
    if engine == "compiled" or (engine == "auto" and z.shape[0] >= jit.MIN_ROWS):
        out = fit_compiled(z, start, n_iter=n_iter, tol=tol, covars_prior=covars_prior)
        if out is not None:
            return out
    return fit_hmmlearn(z, start, n_iter=n_iter, tol=tol, covars_prior=covars_prior,
                        min_covar=min_covar)
