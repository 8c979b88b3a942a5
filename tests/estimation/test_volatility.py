"""Tests of the EWMA and GARCH(1,1) variance forecasts.

References: arch (EWMAVariance recursion, GARCH fix/fit), pandas (ewm with adjust=False).
"""

import json

import numpy as np
import pandas as pd
import pytest
from arch import arch_model
from arch.univariate import EWMAVariance

from tracker.estimation.volatility import (
    EwmaParams,
    GarchParams,
    VarianceState,
    ewma_variance,
    fit_garch,
    garch_backcast,
    garch_variance,
)


def _garch_returns(seed: int, n: int, omega=2e-6, alpha=0.08, beta=0.90) -> np.ndarray:
    rng = np.random.default_rng(seed)
    z = rng.standard_normal(n)
    r = np.empty(n)
    h = omega / (1.0 - alpha - beta)
    for t in range(n):
        r[t] = np.sqrt(h) * z[t]
        h = omega + alpha * r[t] ** 2 + beta * h
    return r


@pytest.fixture(scope="module")
def returns() -> np.ndarray:
    return _garch_returns(seed=11, n=3000)


def test_ewma_equals_arch_recursion_after_warmup(returns):
    # Reference: arch.univariate.EWMAVariance (RiskMetrics) started at our start value.
    params = EwmaParams(lam=0.94, n_init=20)
    fc = ewma_variance(returns, params)
    n = params.n_init
    ref = np.empty(returns.size - n)
    EWMAVariance(0.94).compute_variance(np.empty(0), returns[n:], ref, fc.h[n],
                                        np.empty((returns.size - n, 2)))
    np.testing.assert_allclose(fc.h[n:], ref, rtol=1e-12, atol=0)


def test_ewma_monthly_decay_equals_arch_with_stated_start(returns):
    # Reference: arch EWMAVariance at lam = 0.97 with backcast = the stated start variance.
    v0 = 1.5e-4
    fc = ewma_variance(returns, EwmaParams.monthly(), initial_variance=v0)
    ref = np.empty(returns.size)
    EWMAVariance(0.97).compute_variance(np.empty(0), returns, ref, v0,
                                        np.empty((returns.size, 2)))
    np.testing.assert_allclose(fc.h, ref, rtol=1e-12, atol=0)
    assert fc.n_warmup == 0


def test_ewma_equals_pandas_ewm(returns):
    # Reference: pandas ewm(alpha = 1 - lam, adjust=False) of r**2 starts at r[0]**2, so it
    # is our forecast one row later when our start variance is r[0]**2.
    lam = 0.94
    fc = ewma_variance(returns, EwmaParams(lam=lam), initial_variance=returns[0] ** 2)
    ref = pd.Series(returns ** 2).ewm(alpha=1.0 - lam, adjust=False).mean().to_numpy()
    np.testing.assert_allclose(fc.h[1:], ref[:-1], rtol=1e-12)
    np.testing.assert_allclose(fc.state.h_next, ref[-1], rtol=1e-12)


def test_ewma_warmup_uses_only_past_returns(returns):
    params = EwmaParams(lam=0.94, n_init=10)
    fc = ewma_variance(returns, params)
    assert np.isnan(fc.h[0])
    for t in range(1, params.n_init + 1):
        assert fc.h[t] == pytest.approx(np.mean(returns[:t] ** 2), rel=1e-13)
    assert fc.n_warmup == params.n_init


@pytest.mark.parametrize("k", [0, 5, 25, 1500])
def test_no_look_ahead(returns, k):
    # h[t] must not move when r[t] (or anything later) changes.
    base = ewma_variance(returns).h
    bumped = returns.copy()
    bumped[k:] *= 3.0
    h = ewma_variance(bumped).h
    np.testing.assert_array_equal(h[: k + 1], base[: k + 1])
    assert h[k + 1] != base[k + 1]
    gp = GarchParams(omega=2e-6, alpha=0.08, beta=0.9)
    state = VarianceState(h_next=1e-4, started=True)
    g0 = garch_variance(returns, gp, state=state).h
    g1 = garch_variance(bumped, gp, state=state).h
    np.testing.assert_array_equal(g1[: k + 1], g0[: k + 1])


@pytest.mark.parametrize("split", [3, 20, 21, 1000])
def test_ewma_two_chunks_equal_one_pass(returns, split):
    r = returns.copy()
    r[[2, 7, 30, 999, 1000, 1001]] = np.nan
    params = EwmaParams(lam=0.94, n_init=20)
    full = ewma_variance(r, params)
    a = ewma_variance(r[:split], params)
    b = ewma_variance(r[split:], params, state=a.state)
    np.testing.assert_allclose(np.concatenate((a.h, b.h)), full.h, rtol=1e-12, atol=0)
    assert a.n_warmup + b.n_warmup == full.n_warmup
    assert b.state.n_obs == full.state.n_obs
    assert b.state.h_next == pytest.approx(full.state.h_next, rel=1e-12)


def test_missing_rows_carry_the_forecast_forward(returns):
    r = returns[:200].copy()
    r[100:103] = np.nan
    fc = ewma_variance(r)
    # rows 100..103 all get the forecast made after row 99; row 103 is the next valid row
    assert np.all(fc.h[100:104] == fc.h[100])
    lam = 0.94
    assert fc.h[104] == pytest.approx(lam * fc.h[103] + (1 - lam) * r[103] ** 2, rel=1e-14)


def test_garch_fixed_params_equal_arch_fix(returns):
    # Reference: arch_model(..., mean='Zero', vol='GARCH').fix in percent units; our decimal
    # recursion at the same parameters must give the same conditional variance (1e-8 rel).
    omega_pct, alpha, beta = 0.03, 0.07, 0.9
    ref = arch_model(100 * returns, mean="Zero", vol="GARCH", p=1, q=1,
                     rescale=False).fix([omega_pct, alpha, beta])
    mine = garch_variance(returns, GarchParams(omega_pct / 1e4, alpha, beta))
    np.testing.assert_allclose(mine.h, ref.conditional_volatility ** 2 / 1e4, rtol=1e-8)


def test_garch_backcast_equals_arch(returns):
    # Reference: arch's volatility backcast (percent units scale by 1e4).
    from arch.univariate import GARCH

    assert garch_backcast(returns) == pytest.approx(GARCH().backcast(100 * returns) / 1e4,
                                                    rel=1e-12)


def test_garch_fit_matches_arch_and_truth():
    r = _garch_returns(seed=5, n=5000, omega=2e-6, alpha=0.08, beta=0.90)
    fit = fit_garch(r)
    assert fit.status == "ok"
    # Reference: arch's own fit of the same model; our h at its parameters equals its output.
    ref = arch_model(100 * r, mean="Zero", vol="GARCH", p=1, q=1, rescale=False).fit(disp="off")
    np.testing.assert_allclose(fit.forecast.h, ref.conditional_volatility ** 2 / 1e4, rtol=1e-8)
    assert fit.params.omega == pytest.approx(ref.params.iloc[0] / 1e4, rel=1e-10)
    # Known truth (seeded simulation): persistence 0.98, alpha 0.08; loose sampling bands.
    assert fit.params.alpha + fit.params.beta == pytest.approx(0.98, abs=0.02)
    assert fit.params.alpha == pytest.approx(0.08, abs=0.03)


def test_garch_two_chunks_equal_one_pass(returns):
    gp = GarchParams(omega=2e-6, alpha=0.08, beta=0.9)
    r = returns.copy()
    r[[10, 11, 1200]] = np.nan
    full = garch_variance(r, gp)
    a = garch_variance(r[:1200], gp)
    b = garch_variance(r[1200:], gp, state=a.state)
    np.testing.assert_allclose(np.concatenate((a.h, b.h)), full.h, rtol=1e-12, atol=0)


def test_garch_too_little_data():
    fit = fit_garch(np.full(50, 0.01) * np.resize([1, -1], 50))
    assert fit.status == "too_little_data"
    assert np.isnan(fit.params.alpha) and fit.forecast is None


def test_states_and_params_round_trip_json(returns):
    for obj in (ewma_variance(returns[:5]).state, ewma_variance(np.array([np.nan])).state,
                EwmaParams(0.97, 30), GarchParams(1e-6, 0.05, 0.93)):
        text = json.dumps(obj.to_dict(), allow_nan=False)
        back = type(obj).from_dict(json.loads(text))
        assert back.to_dict() == obj.to_dict()
    # resuming from a stored state gives the one-pass result
    a = ewma_variance(returns[:500])
    stored = VarianceState.from_dict(json.loads(json.dumps(a.state.to_dict())))
    b = ewma_variance(returns[500:], state=stored)
    np.testing.assert_allclose(b.h, ewma_variance(returns).h[500:], rtol=1e-12)


def test_ewma_rejects_bad_decay():
    with pytest.raises(ValueError):
        EwmaParams(lam=1.0)
