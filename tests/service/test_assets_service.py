"""The asset layer on the invented scenario, where the true exposures are known."""

from __future__ import annotations

import math

import pandas as pd

from tracker.service.assets import load_assets_view
from tracker.store.bootstrap import open_store


def test_exposures_cover_the_true_exposures(estimated_demo_template):
    """Stated 90% intervals cover the true exposures for at least 85% of pairs (issue target)."""
    store, _ = open_store(estimated_demo_template)
    with store.connect() as con:
        df = con.execute("""
            SELECT e.asset_id, e.factor_id, e.beta, e.beta_se, t.beta AS truth
            FROM exposure_estimates e JOIN truth_exposures t USING (asset_id, factor_id)
            WHERE e.superseded_at IS NULL
              AND e.date = (SELECT max(date) FROM exposure_estimates)""").df()
    assert len(df) >= 80  # ten assets x the long-history factors
    covered = (df["beta"] - df["truth"]).abs() <= 1.6448536 * df["beta_se"]
    assert covered.mean() >= 0.85


def test_exposures_are_real_time_vintages(estimated_demo_template):
    store, config = open_store(estimated_demo_template)
    with store.connect() as con:
        first = con.execute("SELECT min(date) FROM exposure_estimates").fetchone()[0]
        start = con.execute("SELECT min(date) FROM asset_returns").fetchone()[0]
        n_dates = con.execute("SELECT count(DISTINCT date) FROM factor_returns WHERE date < ?", [first]).fetchone()[0]
    # the first estimate needs a full window of data before it: no look-ahead
    assert first > start and n_dates == config.assets.window_daily - 1


def test_assets_view_ties_premia_to_expected_returns(estimated_demo_template):
    store, config = open_store(estimated_demo_template)
    view = load_assets_view(store, config)
    assert view.status == "ok" and len(view.rows) == 10
    for row in view.rows:
        # expected excess return = beta' lambda with the latest filtered premia (annualised)
        recomputed = sum(row.exposures[f][0] * view.filtered_premia_ann[f] for f in view.factors)
        assert math.isclose(row.expected_ann, recomputed, rel_tol=1e-6, abs_tol=1e-9)
        assert row.expected_se_ann > 0
        assert math.isclose(row.gap_ann, row.realised_ann - row.expected_ann, rel_tol=1e-12, abs_tol=1e-15)
    assert 0.0 <= view.grs_p <= 1.0
    # the scenario's assets carry no alpha: the GRS test should not reject at 1%
    assert view.grs_p > 0.01
    assert set(view.fama_macbeth_ann) == set(view.factors)
    assert view.sdf_max_sharpe_ann > 0 and pd.notna(view.sdf_max_sharpe_sample_se_ann)


def test_report_carries_the_asset_view(estimated_demo_template):
    import json

    from tracker.service.report import render_report

    store, config = open_store(estimated_demo_template)
    doc = json.loads(render_report(store, config, "json"))
    view = load_assets_view(store, config)
    assert doc["assets"]["status"] == "ok"
    got = {r["asset_id"]: r["expected_ann"] for r in doc["assets"]["rows"]}
    assert got == {r.asset_id: r.expected_ann for r in view.rows}
    text = render_report(store, config, "text")
    assert "GRS test of joint alphas" in text and "Hansen-Jagannathan" in text


def _latest_stored(store):
    with store.connect() as con:
        return con.execute("""
            SELECT asset_id, factor_id, date, beta, beta_se, vintage FROM exposure_estimates
            WHERE superseded_at IS NULL AND date = (SELECT max(date) FROM exposure_estimates
                                                    WHERE superseded_at IS NULL)
            ORDER BY asset_id, factor_id""").df()


def test_a_days_exposures_read_one_window_and_equal_the_whole_history_fit(estimated_demo_store, monkeypatch):
    # The daily update reads about one window of rows, not the whole history; the new
    # date's rolling estimates only see the last window, so they must equal a fit of the
    # whole panel at that date (same rows, same arithmetic: to rounding, 1e-12).
    import numpy as np

    from tracker.estimation.exposures import RollingExposureModel
    from tracker.ingest.inbox import process_inbox
    from tracker.seed_db import scenario as sc
    from tracker.service import assets
    from tracker.service import estimate as est

    from drop_helpers import drop

    store, config = estimated_demo_store
    scn = sc.generate()
    day = sc.held_back_days(scn)[0]
    drop(config.inbox_path(store.folder), "day.sql", sc.drop_file_text(scn, day))
    assert [o.outcome for o in process_inbox(store, config)] == ["applied"]
    reads = []
    original = assets._panel

    def spying(con, *args, **kwargs):
        panel = original(con, *args, **kwargs)
        reads.append((kwargs.get("since"), None if panel is None else len(panel.dates)))
        return panel

    monkeypatch.setattr(assets, "_panel", spying)
    summary = est.update(store, config)
    with store.connect() as con:
        # the run's own row counts choose the same factors as a count over the table
        assert assets.exposure_factors(con, config, row_counts=summary.row_counts) == \
            assets.exposure_factors(con, config)
    window = config.assets.window_daily
    assert len(reads) == 1 and reads[0][0] is not None
    # a window and READ_MARGIN asset dates before the new day, through it: not the history
    assert window <= reads[0][1] <= window + assets.READ_MARGIN + 2
    stored = _latest_stored(store)
    assert pd.Timestamp(stored["date"].iloc[0]) == day
    with store.connect() as con:
        whole = original(con, config)
    fit = RollingExposureModel(window).fit(whole.excess, whole.factors, output_from=len(whole.dates) - 1)
    assert pd.Timestamp(fit.dates[-1]) == day
    for i, a in enumerate(fit.assets):
        for j, f in enumerate(fit.factors):
            row = stored[(stored["asset_id"] == a) & (stored["factor_id"] == f)]
            np.testing.assert_allclose(row[["beta", "beta_se"]].to_numpy()[0],
                                       [fit.betas[-1, i, j], fit.se[-1, i, j]], rtol=1e-12, atol=0)


def test_exposures_take_the_market_regimes_factors_and_follow_a_change_of_them(estimated_demo_store):
    # more traded long-history factors than the market regime takes: the assets are
    # regressed on its choice (at most market_factors_max), and a change of that set
    # supersedes the stored exposures and derives them again under a new vintage
    import dataclasses

    from tracker.service.assets import ALPHA, exposure_factors, update_exposures

    store, config = estimated_demo_store
    before = _latest_stored(store)
    with store.connect() as con:
        all_long = exposure_factors(con)                       # no config: every eligible factor
        assert sorted(before["factor_id"].unique()) == sorted([ALPHA, *exposure_factors(con, config)])
        small = dataclasses.replace(config, models=dataclasses.replace(config.models, market_factors_max=3))
        chosen = exposure_factors(con, small)
    assert len(all_long) > 3 and len(chosen) == 3 and set(chosen) <= set(all_long)
    assert update_exposures(store, small) > 0
    after = _latest_stored(store)
    assert sorted(after["factor_id"].unique()) == sorted([ALPHA, *chosen])
    assert after["vintage"].iloc[0] == before["vintage"].iloc[0] + 1
    with store.connect() as con:
        left = con.execute("SELECT count(*) FROM exposure_estimates WHERE superseded_at IS NULL "
                           "AND vintage = ?", [int(before["vintage"].iloc[0])]).fetchone()[0]
    assert left == 0                                           # the old set is superseded everywhere
    assert update_exposures(store, small) == 0                 # and then nothing is due
    view = load_assets_view(store, small)
    assert view.status == "ok" and set(view.factors) == set(chosen)


def test_exposure_rows_are_the_same_in_small_frames(monkeypatch):
    # the rows to store are built and inserted a run of dates at a time (FRAME_ROWS): the
    # same rows, cut anywhere, as in one frame
    import numpy as np

    from tracker.estimation.exposures import RollingExposureModel
    from tracker.service import assets

    rng = np.random.default_rng(3)
    f = rng.normal(0, 0.01, (160, 2))
    y = f @ rng.normal(1, 0.3, (2, 5)) + rng.normal(0, 0.01, (160, 5))
    y[150, 1] = np.nan
    est = RollingExposureModel(60, min_nobs=59).fit(y, f)
    whole = pd.concat(list(assets._exposure_frames(est, 1, 60)), ignore_index=True)
    monkeypatch.setattr(assets, "FRAME_ROWS", 37)
    frames = list(assets._exposure_frames(est, 1, 60))
    assert len(frames) > 10 and max(len(x) for x in frames) <= 37 + 3 * 5
    cut = pd.concat(frames, ignore_index=True)
    key = ["date", "asset_id", "factor_id"]
    pd.testing.assert_frame_equal(cut.sort_values(key, ignore_index=True), whole.sort_values(key, ignore_index=True))
    assert len(whole) == int((est.cell_status == 0).sum()) * 3     # intercept and two factors per cell
