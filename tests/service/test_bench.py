"""A tiny ``tracker bench`` run: every documented JSON field is there and numbers are finite.

No timing is asserted (speed targets are measured by the bench, not by unit tests);
only that the run measured what it says it measured.
"""

from __future__ import annotations

import argparse
import json
import math

import numpy as np
import pytest

from tracker.service.bench import add_bench_arguments, bench_command
from tracker.service.bench_data import make_panel

CELL_FIELDS = {"factors", "days", "state", "load_s", "rows_loaded", "full_refit", "warm_refit", "naive",
               "borrowed_state", "sample_refit", "incremental", "ui", "peak_rss_mb", "peak_children_rss_mb",
               "build_peak_rss_mb", "build_peak_children_rss_mb", "seconds", "store_rows", "store_mb"}
UPDATE_FIELDS = {"wall_s", "tasks", "kinds", "market", "phases_s", "model_cpu_s", "rows_written", "skipped"}
INCREMENTAL_FIELDS = {"new_days", "new_rows", "ingest_s", "ingest_outcomes", "plans", "advance_s",
                      "advance_update", "due_s", "due_update", "advance_end_to_end_s", "end_to_end_s", "close_s"}
NAIVE_FIELDS = {"factors", "uc_s", "markov_s", "wall_s", "per_factor_s", "failed_fits", "loglik_regimes",
                "loglik_premium_same_model", "loglik_premium_models"}
INGEST_FIELDS = {"rows", "factors", "days", "file_mb", "seconds", "rows_per_s", "rows_written", "outcome"}


def _finite(x) -> bool:
    return isinstance(x, (int, float)) and not isinstance(x, bool) and math.isfinite(x)


def _run(tmp_path, **extra):
    parser = argparse.ArgumentParser()
    add_bench_arguments(parser)
    path = tmp_path / "bench.json"
    argv = ["--factors", "3", "--days", "400", "--new-days", "1,3", "--ingest-rows", "3000",
            "--json", str(path), "--workdir", str(tmp_path / "work"), "--in-process"] + extra.get("argv", [])
    lines: list[str] = []
    code = bench_command(parser.parse_args(argv), lines.append)
    return code, json.loads(path.read_text()), "\n".join(lines)


@pytest.fixture(scope="module")
def tiny(tmp_path_factory):
    return _run(tmp_path_factory.mktemp("bench"))


def test_tiny_bench_writes_every_documented_field(tiny):
    code, res, text = tiny
    assert code == 0, text
    assert {"version", "created", "machine", "options", "cells", "ingest", "targets", "seconds"} <= set(res)
    (cell,) = res["cells"]
    assert CELL_FIELDS <= set(cell), CELL_FIELDS - set(cell)
    assert (cell["factors"], cell["days"], cell["state"]) == (3, 400, "refit")
    assert cell["rows_loaded"] == 3 * 400
    assert UPDATE_FIELDS <= set(cell["full_refit"])
    assert cell["full_refit"]["kinds"] == {"backfill": 3}
    # three cold refits, each from the store as loaded (default --refit-repeats 3): the
    # median run is reported, and the store holds one estimation, not three
    runs = cell["full_refit"]["repeats_wall_s"]
    assert len(runs) == 3 and cell["full_refit"]["wall_s"] == sorted(runs)[1]
    assert cell["store_rows"]["premium_estimates"] == 3 * (400 + 1 + 3)
    assert "median of 3 refits" in text
    assert set(cell["full_refit"]["model_cpu_s"]) >= {"volatility", "premium", "regimes", "regime_premium"}
    assert NAIVE_FIELDS <= set(cell["naive"]) and cell["naive"]["factors"] == 3
    assert [i["new_days"] for i in cell["incremental"]] == [1, 3]
    for inc in cell["incremental"]:
        assert INCREMENTAL_FIELDS <= set(inc)
        assert inc["new_rows"] == 3 * inc["new_days"]
        assert inc["ingest_outcomes"] == {"applied": 1}
        assert sum(inc["plans"].values()) == 3
    assert INGEST_FIELDS <= set(res["ingest"]) and res["ingest"]["rows_written"] == 3000
    assert {t["target"] for t in res["targets"]} and all({"target", "measured", "met"} <= set(t) for t in res["targets"])


def test_tiny_bench_numbers_are_finite(tiny):
    _, res, _ = tiny
    (cell,) = res["cells"]
    nums = [cell["load_s"], cell["seconds"], cell["peak_rss_mb"], cell["full_refit"]["wall_s"],
            cell["full_refit"]["per_factor_s"], cell["naive"]["per_factor_s"], cell["naive"]["uc_s"],
            cell["naive"]["markov_s"], res["ingest"]["rows_per_s"], res["ingest"]["file_mb"],
            *cell["full_refit"]["phases_s"].values(), *cell["full_refit"]["model_cpu_s"].values()]
    for inc in cell["incremental"]:
        nums += [inc["ingest_s"], inc["advance_s"], inc["due_s"], inc["end_to_end_s"]]
    assert all(_finite(v) and v >= 0 for v in nums), nums
    ll = cell["naive"]["loglik_regimes"]
    # compared where both fits succeeded (at T = 400 a regime fit may be 'unidentified')
    assert 1 <= ll["compared"] <= 3 and _finite(ll["ours_minus_naive_rel_min"])
    assert cell["ui"] is not None and _finite(cell["ui"]["load_board_s"]) and cell["ui"]["board_rows"] == 3
    if cell["ui"].get("mode") == "textual" and "error" not in cell["ui"]:
        assert all(_finite(cell["ui"][k]) for k in ("startup_s", "cursor_down_s", "sort_s"))
        assert cell["ui"]["cursor_moved"]


def test_bench_with_assets_derives_their_exposures_and_drops_their_rows(tmp_path):
    # --assets K: the cell's assets get their exposures before the daily drops, and each
    # drop carries their rows and the risk-free rate, so the day's update extends them
    parser = argparse.ArgumentParser()
    add_bench_arguments(parser)
    path = tmp_path / "bench.json"
    argv = ["--cells", "3x800", "--new-days", "1", "--ingest-rows", "0", "--no-ui", "--assets", "4",
            "--json", str(path), "--workdir", str(tmp_path / "work"), "--in-process"]
    lines: list[str] = []
    assert bench_command(parser.parse_args(argv), lines.append) == 0, "\n".join(lines)
    (cell,) = json.loads(path.read_text())["cells"]
    first = cell["first_exposures"]
    assert first["assets"] == 4 and first["in_refit"]          # a refit cell: its update derived them
    (inc,) = cell["incremental"]
    assert inc["ingest_outcomes"] == {"applied": 1}
    assert inc["advance_update"]["phases_s"]["exposures"] >= 0
    # 800 days, a 756-day window: the last 45 dates before the drop, then the new one,
    # each with 4 assets x (3 factors + the intercept)
    assert cell["store_rows"]["exposure_estimates"] == (800 - 756 + 1 + 1) * 4 * 4
    assert any("with 4 assets" in line for line in lines)


def test_reduced_grid_options_are_parsed():
    parser = argparse.ArgumentParser()
    add_bench_arguments(parser)
    args = parser.parse_args(["--factors", "10,100", "--days", "2000"])
    assert (args.factors, args.days, args.refit_max) == ("10,100", "2000", 100)
    assert bench_command({"factors": "0", "days": "2000"}, lambda _: None) == 2   # refused, nothing run
    assert bench_command({"factors": "3", "days": "400", "refit_repeats": 0}, lambda _: None) == 2


def test_synthetic_panel_is_seeded_and_realistic():
    # daily vol 0.3%-1.5% and Sharpe 0-0.6 by construction (the ranges); one shared
    # regime chain: the stressed regime raises every factor's realised volatility
    a, b = make_panel(40, 3000, seed=5), make_panel(40, 3000, seed=5)
    np.testing.assert_array_equal(a.returns, b.returns)
    assert not np.array_equal(a.returns, make_panel(40, 3000, seed=6).returns)
    assert 0.003 <= a.vol.min() and a.vol.max() <= 0.015 and 0 <= a.sharpe.min() and a.sharpe.max() <= 0.6
    realised = a.returns.std(axis=0)
    np.testing.assert_allclose(realised, a.vol, rtol=0.15)          # sampling error at T = 3000
    calm, stressed = (a.returns[a.regimes == k].std(axis=0) for k in (0, 1))
    assert np.all(stressed > 1.5 * calm)                               # true ratio 1.8 / 0.8 = 2.25
    assert np.all(np.is_busday(a.dates)) and np.all(np.diff(a.dates).astype(int) > 0)


def test_the_one_day_target_is_judged_on_the_first_day_and_shows_the_next():
    from tracker.service.bench_report import targets

    def day(n, s):
        return {"new_days": n, "end_to_end_s": s, "advance_end_to_end_s": s, "plans": {"advance": 500}}

    cell = {"factors": 500, "days": 6500, "incremental": [day(1, 1.2), day(5, 3.0), day(1, 0.9)]}
    (one,) = [t for t in targets({"cells": [cell]}) if t["target"].startswith("one-day")]
    assert one["met"] is False                                   # the first day, 1.2 s, is the one judged
    assert "1.200 s end to end" in one["measured"] and "next day(s) 0.900 s" in one["measured"]
