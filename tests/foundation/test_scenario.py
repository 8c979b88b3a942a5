"""The invented demo scenario: deterministic, realistic magnitudes, truth kept apart."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from tracker.seed_db import scenario as sc


@pytest.fixture(scope="module")
def scn():
    return sc.generate()


def test_deterministic(scn):
    again = sc.generate()
    pd.testing.assert_frame_equal(scn.factor_returns, again.factor_returns)
    pd.testing.assert_frame_equal(scn.asset_returns, again.asset_returns)


def test_sizes_match_the_brief(scn):
    assert 8 <= len(scn.factors) <= 12 and 8 <= len(scn.assets) <= 12
    years = (scn.truth_regimes["date"].iloc[-1] - scn.truth_regimes["date"].iloc[0]).days / 365.25
    assert 24 <= years <= 27
    assert len(sc.held_back_days(scn)) == sc.HELD_BACK_DAYS


def test_realistic_magnitudes(scn):
    wide = scn.factor_returns.pivot(index="date", columns="factor_id", values="ret")
    vol = wide.std()
    assert ((vol > 0.003) & (vol < 0.015)).all(), vol
    truth = scn.truth_premia.pivot(index="date", columns="factor_id", values="premium")
    true_sr = truth.mean() / vol * np.sqrt(252)
    assert (true_sr >= -1e-12).all() and (true_sr <= 0.6).all(), true_sr


def test_zero_premium_factor_and_data_mining_trap(scn):
    truth = scn.truth_premia.pivot(index="date", columns="factor_id", values="premium")
    assert (truth["REV"] == 0).all() and (truth["SENT"].dropna() == 0).all()
    sent = scn.factor_returns.query("factor_id == 'SENT' and date <= @scn.cutoff")["ret"]
    t = sent.mean() / sent.std(ddof=1) * np.sqrt(len(sent))
    assert 2.0 <= t <= 3.0  # looks good in sample by chance
    assert len(sent) < 4 * 252
    assert bool(scn.factors.set_index("factor_id").loc["SENT", "is_new"])


def test_three_regimes_with_realistic_persistence(scn):
    s = scn.truth_regimes["regime"].to_numpy()
    assert set(np.unique(s)) == {0, 1, 2}
    stay = np.mean(s[1:] == s[:-1])
    assert stay > 0.95
    wide = scn.factor_returns.pivot(index="date", columns="factor_id", values="ret")
    by_regime = wide["MKT"].groupby(s).std()
    assert by_regime[0] < by_regime[1] < by_regime[2]


def test_assets_are_exposures_times_factors_plus_noise(scn):
    f = scn.factor_returns.pivot(index="date", columns="factor_id", values="ret").fillna(0.0)
    a = scn.asset_returns.pivot(index="date", columns="asset_id", values="ret")
    rf = scn.risk_free.set_index("date")["rate"]
    excess = a.sub(rf, axis=0)
    ids = [s.factor_id for s in sc.FACTORS]
    beta_hat, *_ = np.linalg.lstsq(f[ids].to_numpy(), excess[[x[0] for x in sc.ASSETS]].to_numpy(), rcond=None)
    np.testing.assert_allclose(beta_hat.T, sc.EXPOSURES, atol=0.06)


def test_drop_files_use_the_drop_format(scn):
    day = sc.held_back_days(scn)[0]
    text = sc.drop_file_text(scn, day)
    assert text.count("INSERT INTO") == 3
    assert "INSERT INTO factor_returns (factor_id, date, ret) VALUES" in text
    assert "invented" in text


def test_demo_store_keeps_truth_apart(demo_store):
    store, _ = demo_store
    with store.connect() as con:
        last = con.execute("SELECT max(date) FROM factor_returns").fetchone()[0]
        n_truth = con.execute("SELECT count(*) FROM truth_regimes").fetchone()[0]
        n_est = con.execute("SELECT count(*) FROM premium_estimates").fetchone()[0]
    scn = sc.generate()
    assert last == scn.cutoff.date()
    assert n_truth == len(scn.truth_regimes)  # truth covers the held-back days too
    assert n_est == 0
