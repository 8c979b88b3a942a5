"""Per-factor task behaviour that the store-level tests do not isolate."""

from __future__ import annotations

import dataclasses

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st

from tracker.config import config_from_dict
from tracker.service.factor_models import FactorTask, drift_floor_q, run_factor

SETTINGS = dataclasses.asdict(config_from_dict({}).models)


def _fit(y: np.ndarray) -> dict:
    dates = np.datetime64("2001-01-01") + np.arange(len(y))
    out = run_factor(FactorTask("X", "daily", dates, y, SETTINGS, refit=True))
    return out.params["premium"]


def test_warm_up_rows_do_not_inflate_q():
    # Regression: the EWMA warm-up made h ~ r_0^2 for the first rows; the diffuse start
    # then pinned the premium to the first return with a tiny variance, and the likelihood
    # bought that back with a large q (1e-7 here, against a true q of 0). Seeded
    # simulation with a constant premium: q must stay within 100x the stated floor.
    rng = np.random.default_rng(11)
    y = 3e-4 + 0.011 * rng.standard_normal(3000)
    floor = drift_floor_q(y, "daily", SETTINGS["premium_drift_floor"])
    for first in (y[0], 5e-6):
        y2 = y.copy()
        y2[0] = first
        assert _fit(y2)["q"] <= 100 * floor


def test_drift_floor_matches_its_definition():
    # q = (d sd / ppy)^2: the premium's annual Sharpe ratio moves by d per sqrt(year).
    rng = np.random.default_rng(3)
    y = 0.01 * rng.standard_normal(5000)
    q = drift_floor_q(y, "daily", 0.05)
    assert np.isclose(q, (0.05 * np.std(y, ddof=1) / 252) ** 2, rtol=1e-12)
    assert drift_floor_q(y, "daily", 0.0) == 0.0


def _regime_series(seed: int, n: int = 3000) -> np.ndarray:
    rng = np.random.default_rng(seed)
    s = np.zeros(n, int)
    for t in range(1, n):
        s[t] = s[t - 1] if rng.random() < 0.99 else 1 - s[t - 1]
    return np.where(s == 0, 4e-4 + 0.006 * rng.standard_normal(n), -2e-4 + 0.016 * rng.standard_normal(n))


def test_regime_premium_shares_the_local_level_q_by_default():
    y = _regime_series(21)
    dates = np.datetime64("2001-01-01") + np.arange(len(y))
    out = run_factor(FactorTask("X", "daily", dates, y, SETTINGS, refit=True))
    assert out.params["regime_premium"]["q"] == out.params["premium"]["q"]
    free = {**SETTINGS, "regime_premium_q": "free"}
    out_free = run_factor(FactorTask("X", "daily", dates, y, free, refit=True))
    floor = drift_floor_q(y, "daily", SETTINGS["premium_drift_floor"])
    # its own q, never below the stated floor (a bound of the search)
    assert out_free.params["regime_premium"]["q"] >= floor * (1 - 1e-9)
    ll = {f.model: f.loglik for f in out.fits}
    ll_free = {f.model: f.loglik for f in out_free.fits}
    # the restricted (shared-q) maximum cannot beat the free one
    assert ll["regime_premium"] <= ll_free["regime_premium"] + 1e-6


def test_vectorised_per_date_warnings_equal_the_row_by_row_rules():
    # tracker.service.factor_warnings.per_date_warnings (conditions on whole arrays, rules
    # called where they fire) against per_date_warnings_loop (every rule on every row),
    # with missing returns, a block start inside the history and thresholds that make
    # every per-date rule fire somewhere (loose limits: IMPLAUSIBLE_SR, REGIME_AMBIG)
    from tracker.estimation.warning_rules import WarningThresholds
    from tracker.service.factor_warnings import per_date_warnings, per_date_warnings_loop

    y = _regime_series(5, 2500)
    y[[7, 300, 301, 1800]] = np.nan
    y[1200] = 0.2                                    # an outlier
    dates = np.datetime64("2001-01-01") + np.arange(len(y))
    out = run_factor(FactorTask("X", "daily", dates, y, SETTINGS, refit=True))
    loose = WarningThresholds(implausible_sharpe=0.5, implausible_min_years=1.0,
                              regime_ambiguous_prob=0.9)
    for th in (WarningThresholds(), loose):
        for first, n_prior, end in ((0, 0, None), (900, 40, 2000), (2499, 0, None)):
            fast = per_date_warnings(out, "daily", first, n_prior, th, end_index=end)
            slow = per_date_warnings_loop(out, "daily", first, n_prior, th, end_index=end)
            assert fast == slow
    codes = {r["code"] for r in per_date_warnings(out, "daily", 0, 0, loose)}
    assert codes == {"NOISE", "IMPLAUSIBLE_SR", "REGIME_AMBIG", "OUTLIER"}



def test_warning_rows_cross_processes_unchanged():
    """A worker's per-date rows are pickled as columns (WarningRows); what arrives is the
    same list of the same dicts, dates still numpy day scalars, None and NaN kept."""
    import pickle

    from tracker.estimation.warning_rules import WarningThresholds
    from tracker.service.factor_warnings import WarningRows, per_date_warnings

    y = _regime_series(6, 1500)
    y[400] = 0.2
    dates = np.datetime64("2001-01-01") + np.arange(len(y))
    out = run_factor(FactorTask("X", "daily", dates, y, SETTINGS, refit=True))
    rows = per_date_warnings(out, "daily", 0, 0, WarningThresholds(regime_ambiguous_prob=0.9))
    assert len({r["code"] for r in rows}) >= 2
    rows[0] = {**rows[0], "value": float("nan")}
    back = pickle.loads(pickle.dumps(WarningRows(rows), protocol=pickle.HIGHEST_PROTOCOL))
    assert isinstance(back, WarningRows) and len(back) == len(rows)
    assert [list(r) for r in back] == [list(r) for r in rows]          # same keys, same order
    assert back[1:] == rows[1:] and np.isnan(back[0]["value"])
    assert all(type(b["date"]) is type(r["date"]) and b["date"] == r["date"] for b, r in zip(back, rows))
    # the dates travel as one array, not one object each
    assert len(pickle.dumps(WarningRows(rows))) < len(pickle.dumps(list(rows)))
    # rows of different shapes, and no rows, still round-trip
    odd = WarningRows([{"date": dates[0], "code": "A"}, {"code": "B"}])
    assert pickle.loads(pickle.dumps(odd)) == list(odd)
    assert pickle.loads(pickle.dumps(WarningRows())) == []

# ------------------------------------------------------------------ state JSON (orjson)

_json_leaf = (
    st.none() | st.booleans() | st.integers(-(2**63), 2**63 - 1) | st.text(max_size=12)
    | st.floats(allow_nan=False, allow_infinity=False)
    | st.sampled_from([0.0, -0.0, 5e-324, 2.2250738585072014e-308, 1e-300, 1.7976931348623157e308, 0.1, 1 / 3])
)
_json_value = st.recursive(
    _json_leaf,
    lambda inner: st.lists(inner, max_size=5) | st.dictionaries(st.text(max_size=8), inner, max_size=5),
    max_leaves=40,
)


@settings(max_examples=300, deadline=None)
@given(_json_value)
def test_state_json_reads_and_writes_as_the_standard_library(value):
    # reference: Python's standard-library json (allow_nan=False), which wrote and read
    # every state before orjson: the same values both ways, every float bit for bit
    import json

    from tracker.service.factor_models import dumps, loads

    text = dumps(value)
    reference = json.dumps(value, allow_nan=False, separators=(",", ":"))
    assert json.loads(text) == json.loads(reference) == loads(reference) == loads(text)
    floats = [x for x in _leaves(loads(text)) if isinstance(x, float)]
    expected = [x for x in _leaves(json.loads(reference)) if isinstance(x, float)]
    assert [np.float64(x).tobytes() for x in floats] == [np.float64(x).tobytes() for x in expected]


def _leaves(x):
    if isinstance(x, dict):
        for v in x.values():
            yield from _leaves(v)
    elif isinstance(x, list):
        for v in x:
            yield from _leaves(v)
    else:
        yield x


def test_state_json_refuses_a_nan_or_an_infinity_anywhere():
    # as json.dumps(allow_nan=False) did: a state that would read back a NaN as null
    # is refused when written, at any depth and in numpy values too
    import pytest

    from tracker.service.factor_models import dumps

    for bad in (float("nan"), float("inf"), -float("inf"), np.float64("nan"), np.float32("inf")):
        for value in (bad, [1.0, bad], {"a": {"b": [0, {"c": bad}]}}, ({"x": bad},)):
            with pytest.raises(ValueError, match="not JSON compliant"):
                dumps(value)
    with pytest.raises(ValueError, match="not JSON compliant"):
        dumps({"y": np.array([0.1, np.nan])})
    # integer keys are written as text, as the standard library did
    assert dumps({1: 2.5, "k": [None, True]}) == '{"1":2.5,"k":[null,true]}'
