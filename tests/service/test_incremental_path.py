"""The incremental path and its reference twins.

An advance evaluates the latest-date warnings from a stored history summary
(tracker.service.history_summary) instead of the whole history; each piece is held
equal to the whole-history computation it replaces: the library functions for the
statistics (significance.newey_west_mean / long_run_variance; statsmodels' jarque_bera
and acorr_ljungbox through significance.residual_diagnostics; the warning rules), and
the whole-history service path (still used for fits and as the fallback) for the
stored warnings themselves. Tolerance 1e-9 relative: the running sums add in another
order than numpy's pairwise sums.
"""

from __future__ import annotations

import json
import shutil

import numpy as np
import pandas as pd
import pytest

from tracker.estimation import significance as sig
from tracker.estimation import warning_rules as wr
from tracker.service.estimate import update
from tracker.service.factor_warnings import batch_misfit_diagnostics
from tracker.service.history_summary import MAX_LAG, HistorySummary, LagSums, sizes_for
from tracker.store.bootstrap import open_store

RTOL = 1e-9


def _ar1(rng, n, phi=0.3, mean=4e-4, sd=0.01):
    e = rng.standard_normal(n) * sd
    x = np.empty(n)
    x[0] = e[0]
    for t in range(1, n):
        x[t] = phi * x[t - 1] + e[t]
    return x + mean


@pytest.mark.parametrize("n", [5, MAX_LAG, 700, 5000])
def test_lag_sums_give_the_library_newey_west_test(n):
    rng = np.random.default_rng(n)
    x = _ar1(rng, n)
    cut = n // 3
    acc = LagSums.of(x[:cut])
    acc.extend(x[cut: cut + 7])          # one row at a time, as an advance does
    acc.extend(x[cut + 7:])
    got, ref = acc.mean_test(), sig.newey_west_mean(x)
    assert got.status == ref.status and got.lags == ref.lags and got.n_obs == ref.n_obs
    np.testing.assert_allclose([got.mean, got.se, got.t_stat, got.p_value],
                               [ref.mean, ref.se, ref.t_stat, ref.p_value], rtol=RTOL)
    np.testing.assert_allclose(acc.long_run_variance(), sig.long_run_variance(x), rtol=RTOL)
    # survives the JSON round trip of the stored state
    back = LagSums.from_dict(json.loads(json.dumps(acc.to_dict())))
    np.testing.assert_allclose(back.mean_test().t_stat, ref.t_stat, rtol=RTOL)


def test_batch_misfit_matches_statsmodels_one_by_one():
    rng = np.random.default_rng(7)
    th = wr.WarningThresholds()
    tails = {f"F{i}": rng.standard_t(5, size=600) * (1 + 0.1 * i) for i in range(6)}
    tails["short"] = rng.standard_normal(40)        # its own length: the library path
    tails["tiny"] = rng.standard_normal(10)         # too little data
    tails["F0"][::7] += 0.5 * tails["F0"][1::7][: len(tails["F0"][::7])]   # some serial structure
    got = batch_misfit_diagnostics(tails, th)
    for fid, e in tails.items():
        ref = wr.misfit_diagnostics(e, th)          # statsmodels inside
        g = got[fid]
        assert (g.status, g.n_obs, g.lags) == (ref.status, ref.n_obs, ref.lags)
        if ref.status == "ok":
            np.testing.assert_allclose(
                [g.jb_stat, g.jb_p_value, g.skewness, g.kurtosis, g.lb_stat, g.lb_p_value],
                [ref.jb_stat, ref.jb_p_value, ref.skewness, ref.kurtosis, ref.lb_stat, ref.lb_p_value],
                rtol=RTOL)


def _history(rng, n, frequency="daily"):
    if frequency == "daily":
        days = np.arange(np.datetime64("1990-01-01"), np.datetime64("1990-01-01") + 2 * n)
        days = days[np.is_busday(days)]
        keep = rng.random(days.size) > 0.02                 # holes: GAP
        keep[[40, 41, 42, 43, 300, 301]] = False            # a long one
        dates = days[keep][:n]
    else:
        dates = (np.datetime64("1960-01", "M") + np.arange(n)).astype("datetime64[D]") + 27
        dates = np.delete(dates, [10, 11, 50])
        n = dates.size
    y = rng.standard_normal(n) * 0.01
    y[100:106] = 0.0                                        # a repeated run: REPEATED
    y[500:503] = 0.002
    ll = 3.0 + rng.standard_normal(n)
    ll[-21:] -= 1.5                                         # recent misforecasts: DRIFT
    e = rng.standard_normal(n)
    e[0] = np.nan
    prem = 1e-4 + 1e-5 * rng.standard_normal(n)
    pv = np.full(n, 1e-9)
    reg = rng.dirichlet([1, 1], size=n)
    return dates, y, prem, pv, e, ll, reg


@pytest.mark.parametrize("frequency", ["daily", "monthly"])
def test_summary_reproduces_the_whole_history_rules(frequency):
    rng = np.random.default_rng(3)
    th = wr.WarningThresholds()
    sizes = sizes_for(th, 21)
    arrays = _history(rng, 3000 if frequency == "daily" else 400, frequency)
    dates, y, _, _, e, ll, _ = arrays
    s = HistorySummary.empty(sizes, frequency)
    cut = dates.size - 5
    s.extend(*(a[:cut] for a in arrays))
    for i in range(cut, dates.size):                        # then day by day
        s.extend(*(a[i:i + 1] for a in arrays))
    s = HistorySummary.from_dict(json.loads(json.dumps(s.to_dict())))
    ref = [w for w in (wr.rule_gap(dates, frequency, th), wr.rule_repeated(y, th),
                       wr.rule_freq_mismatch(dates, frequency, th)) if w is not None]
    got = s.data_quality_warnings(th)
    assert [(w.code, w.detail, w.value) for w in got] == [(w.code, w.detail, w.value) for w in ref]
    assert {w.code for w in got} >= ({"GAP", "REPEATED"} if frequency == "daily" else {"GAP"})
    d_ref = wr.predictive_loglik_drift(ll, th.drift_window)
    d_got = s.drift(th.drift_window)
    assert d_got.status == d_ref.status == "ok" and d_got.n_baseline == d_ref.n_baseline
    np.testing.assert_allclose([d_got.z, d_got.recent_mean, d_got.baseline_mean],
                               [d_ref.z, d_ref.recent_mean, d_ref.baseline_mean], rtol=RTOL)
    fin = e[np.isfinite(e)]
    np.testing.assert_array_equal(s.errors, fin[-sizes["errors"]:])
    assert s.returns.n == y.size and s.last_date == str(dates[-1])


def test_summary_head_and_the_mean_test_before_the_rows_are_appended():
    # the run reads only a summary's head before its models run (head_from_state), and
    # takes each mean test with the new returns appended to a copy (mean_test_with): the
    # same numbers as the summary extended afterwards, bit for bit; the library twin of
    # that test is test_lag_sums_give_the_library_newey_west_test above
    from tracker.service.history_summary import head_from_state, mean_test_with

    rng = np.random.default_rng(11)
    th = wr.WarningThresholds()
    sizes = sizes_for(th, 21)
    arrays = _history(rng, 1200)
    s = HistorySummary.empty(sizes, "daily")
    s.extend(*(a[:-3] for a in arrays))
    state = {"history": json.loads(json.dumps(s.to_dict()))}
    head = head_from_state(state, sizes, "daily")
    assert head.n_rows == s.n_rows and head.returns.n == s.returns.n
    before = mean_test_with(head.returns, arrays[1][-3:])
    assert head.returns.n == s.returns.n                     # the head is left as it was
    s.extend(*(a[-3:] for a in arrays))
    after = s.mean_test()
    assert [before.mean, before.se, before.t_stat, before.p_value, before.lags] == \
        [after.mean, after.se, after.t_stat, after.p_value, after.lags]
    # refused where the whole summary is: other tail sizes, another frequency, a lost field
    assert head_from_state(state, {**sizes, "errors": 7}, "daily") is None
    assert head_from_state(state, sizes, "monthly") is None
    for key in ("gap", "floats", "lengths"):
        lost = {"history": {k: v for k, v in state["history"].items() if k != key}}
        assert head_from_state(lost, sizes, "daily") is None
    short = {"history": {**state["history"], "lengths": state["history"]["lengths"][:-1]}}
    assert head_from_state(short, sizes, "daily") is None
    # the head decodes only its own part of the packed field, but a field cut short (or
    # with a character that is not base64 where the head reads) is still refused
    text = state["history"]["floats"]
    for bad in (text[:-4], "*" + text[1:]):
        assert head_from_state({"history": {**state["history"], "floats": bad}}, sizes, "daily") is None
    assert head_from_state(None, sizes, "daily") is None


def _version_1(s: HistorySummary) -> dict:
    """A summary as the previous storage layout wrote it: one packed field per list."""
    from tracker.service.history_summary import pack

    def sums(x):
        return {"n": x.n, "total": x.total, "cross": pack(x.cross), "head": pack(x.head), "tail": pack(x.tail)}

    run = dict(s.run)
    run["value"], run["cur_value"] = (pack([np.nan if run[k] is None else run[k]]) for k in ("value", "cur_value"))
    return {"version": 1, "sizes": s.sizes, "frequency": s.frequency, "n_rows": s.n_rows,
            "returns": sums(s.returns), "last_date": s.last_date, "loglik_base": sums(s.loglik_base),
            "loglik_window": pack(s.loglik_window), "errors": pack(s.errors), "premium": pack(s.premium),
            "premium_var": pack(s.premium_var),
            "regimes": {"k": s.regimes.shape[1], "values": pack(s.regimes.ravel())},
            "gap": s.gap, "run": run, "spacing": s.spacing}


def test_a_summary_stored_in_the_previous_layout_reads_the_same():
    # stores written before the one-field layout keep their summaries: read as they are,
    # rewritten in the new layout at the next update; every number survives both trips
    from tracker.service.history_summary import VERSION, head_from_state, summary_from_state

    rng = np.random.default_rng(5)
    th = wr.WarningThresholds()
    sizes = sizes_for(th, 21)
    s = HistorySummary.empty(sizes, "daily")
    s.extend(*_history(rng, 900))
    for stored in (_version_1(s), s.to_dict()):
        state = {"history": json.loads(json.dumps(stored))}
        back = summary_from_state(state, sizes, "daily")
        assert back is not None
        assert back.to_dict() == s.to_dict() and back.to_dict()["version"] == VERSION
        for name in ("errors", "premium", "premium_var", "loglik_window", "regimes"):
            np.testing.assert_array_equal(getattr(back, name), getattr(s, name))
        assert (back.run, back.gap, back.spacing) == (s.run, s.gap, s.spacing)
        head = head_from_state(state, sizes, "daily")
        np.testing.assert_array_equal(head.returns.cross, s.returns.cross)
        assert head.returns.mean_test() == s.mean_test()


# ------------------------------------------------------------------ the store-level twin


def _q(store, text, params=None) -> pd.DataFrame:
    with store.connect() as con:
        return con.execute(text, params or []).df()


def _strip_incremental_state(store) -> None:
    """Make every factor look estimated by an older version: no summary, no extra states."""
    with store.transaction() as con:
        for sid, model, text in con.execute(
                "SELECT subject_id, model, state_json FROM filter_states WHERE model = 'premium'").fetchall():
            d = json.loads(text)
            for key in ("history", "premium_q_half", "premium_q_double", "premium_tail"):
                d.pop(key, None)
            con.execute("UPDATE filter_states SET state_json = ? WHERE subject_id = ? AND model = ?",
                        [json.dumps(d), sid, model])


def _append_day(store, day: pd.Timestamp) -> None:
    from tracker.seed_db import scenario as sc

    rows = sc.generate().factor_returns
    rows = rows[rows["date"] == day]
    with store.transaction() as con:
        con.register("incoming_frame", rows)
        con.execute("INSERT INTO factor_returns (factor_id, date, ret) SELECT factor_id, date, ret FROM incoming_frame")
        con.unregister("incoming_frame")


def _warnings_on(store, day) -> pd.DataFrame:
    return _q(store, """SELECT subject_id, code, severity, detail, value, threshold FROM warnings
                        WHERE date = ? AND superseded_at IS NULL ORDER BY subject_id, code""", [day.date()])


def test_fast_advance_stores_what_the_whole_history_path_stores(estimated_demo_template, tmp_path):
    from tracker.seed_db import scenario as sc

    stores = []
    for name in ("fast", "full"):
        shutil.copytree(estimated_demo_template.parent, tmp_path / name)
        stores.append(open_store(tmp_path / name / "store.duckdb"))
    (fast, config), (full, _) = stores
    _strip_incremental_state(full)
    days = sc.held_back_days(sc.generate())[:2]
    for day in days:
        for store in (fast, full):
            _append_day(store, day)
            assert set(update(store, config).kinds.values()) <= {"advance"}
        a, b = _warnings_on(fast, day), _warnings_on(full, day)
        assert len(a) > 0
        pd.testing.assert_frame_equal(a.drop(columns=["value"]), b.drop(columns=["value"]))
        np.testing.assert_allclose(a["value"].to_numpy(float), b["value"].to_numpy(float), rtol=RTOL)
        pa = _q(fast, "SELECT * EXCLUDE (computed_at) FROM premium_estimates WHERE date = ? ORDER BY ALL", [day.date()])
        pb = _q(full, "SELECT * EXCLUDE (computed_at) FROM premium_estimates WHERE date = ? ORDER BY ALL", [day.date()])
        pd.testing.assert_frame_equal(pa, pb)
    # the fallback rebuilt the summaries: both stores now carry the same ones
    sa = _q(fast, "SELECT subject_id, state_json FROM filter_states WHERE model = 'premium' ORDER BY 1")
    sb = _q(full, "SELECT subject_id, state_json FROM filter_states WHERE model = 'premium' ORDER BY 1")
    for ta, tb in zip(sa["state_json"], sb["state_json"]):
        ha, hb = (HistorySummary.from_dict(json.loads(t)["history"]) for t in (ta, tb))
        assert ha.n_rows == hb.n_rows and ha.gap == hb.gap and ha.run == hb.run
        np.testing.assert_allclose(ha.returns.cross, hb.returns.cross, rtol=RTOL)
        np.testing.assert_allclose(ha.errors, hb.errors, rtol=RTOL)


# ------------------------------------------------------------------ the refit's extras


def test_refit_extras_give_the_whole_history_latest_warnings():
    # A refit's latest-date rules take the fragility and hindsight values from the run's own
    # pass (factor_models._latest_extras) instead of three more whole-history passes; held
    # equal to those passes (extras removed) on invented data, rules and values to 1e-9.
    import dataclasses

    from tracker.config import Config
    from tracker.service.estimate import _settings, _thresholds
    from tracker.service.factor_models import FactorTask, run_factor
    from tracker.service.factor_warnings import LatestContext, latest_warnings

    rng = np.random.default_rng(11)
    n = 1500
    dates = np.arange(np.datetime64("2020-01-01"), np.datetime64("2020-01-01") + n).astype("datetime64[D]")
    y = 3e-4 + 0.01 * rng.standard_normal(n)
    y[[40, 700]] = np.nan
    config = Config()
    out = run_factor(FactorTask("F", "daily", dates, y, _settings(config), refit=True))
    assert out.extras and out.extras["hindsight"] is not None
    from tracker.service.factor_models import hindsight_premium, refiltered_premium

    whole = hindsight_premium(out.params, y)
    np.testing.assert_allclose(out.extras["hindsight"], whole[-out.extras["hindsight"].size:], rtol=RTOL)
    np.testing.assert_allclose([out.extras["q_half"], out.extras["q_double"]],
                               [refiltered_premium(out.params, y, q_scale=s)[0] for s in (0.5, 2.0)],
                               rtol=RTOL)
    th = _thresholds(config)
    ctx = LatestContext(frequency="daily", is_new=False, t_stat=1.2, p_value=0.23, p_adjusted=0.5,
                        latest_date_in_set=dates[-1], revision_count=0, fit_status="ok",
                        fit_message="", regime_status="ok", regime_message="")
    arrays = (out.dates, out.returns, out.premium, out.premium_var, out.std_error, out.loglik_t,
              out.regime_filtered)
    got = latest_warnings(out, ctx, th, *arrays)
    ref = latest_warnings(dataclasses.replace(out, extras={}), ctx, th, *arrays)
    assert [r["code"] for r in got] == [r["code"] for r in ref] and got
    np.testing.assert_allclose([r["value"] if r["value"] is not None else np.nan for r in got],
                               [r["value"] if r["value"] is not None else np.nan for r in ref], rtol=RTOL)
