"""A day's update of many factors runs in forked parts: the same store as one process.

Reference twin: the same advance in this process alone (``ADVANCE_PART_MIN`` above the
number of factors). Every estimate, warning and filter state must be identical, bit for
bit: the parts run the same functions on the same inputs, and the set-level facts (the
tracked-set mean tests and their adjustment) are taken once, before the parts.
"""

from __future__ import annotations

import json
import os
import shutil

import pandas as pd
import pytest

from tracker.service import estimate as est
from tracker.service import executor as executor_mod
from tracker.service.estimate_latest import set_context
from tracker.service.history_summary import summary_from_state
from tracker.store.bootstrap import open_store

from drop_helpers import append_scenario_days as _append_days

TABLES = {
    "premium_estimates": "SELECT * EXCLUDE (computed_at) FROM premium_estimates ORDER BY ALL",
    "regime_estimates": "SELECT * EXCLUDE (computed_at) FROM regime_estimates ORDER BY ALL",
    "warnings": "SELECT * EXCLUDE (computed_at) FROM warnings ORDER BY ALL",
    "filter_states": "SELECT subject_id, model, fit_id, through_date, state_json FROM filter_states ORDER BY ALL",
    "runs": "SELECT kind, reason, subjects, from_date, through_date, status FROM estimation_runs ORDER BY ALL",
}


def _tables(store) -> dict:
    with store.connect() as con:
        return {name: con.execute(q).df() for name, q in TABLES.items()}


def _assert_unchanged(store, before: dict) -> None:
    after = _tables(store)
    for name in TABLES:
        pd.testing.assert_frame_equal(before[name], after[name], check_exact=True, obj=name)


def _advanced(template, folder, min_per_part, monkeypatch):
    shutil.copytree(template.parent, folder)
    store, config = open_store(folder / "store.duckdb")
    monkeypatch.setattr(est, "ADVANCE_PART_MIN", min_per_part)
    from tracker.seed_db import scenario as sc

    for day in sc.held_back_days(sc.generate())[:2]:
        _append_days(store, [day])
        summary = est.update(store, config)
        assert set(summary.kinds.values()) <= {"advance"} and summary.rows_written > 0
    return _tables(store)


def test_split_advance_writes_what_one_process_writes(estimated_demo_template, tmp_path, monkeypatch):
    calls = []
    original = executor_mod.forked_parts

    def counting(fn, parts):
        calls.append(len(parts))
        return original(fn, parts)

    monkeypatch.setattr(est, "forked_parts", counting)
    one = _advanced(estimated_demo_template, tmp_path / "one", 10**6, monkeypatch)
    assert calls == [1, 1]                                  # one part: this process
    calls.clear()
    spill_dirs = []
    mkdtemp = est.tempfile.mkdtemp

    def recording(*args, **kwargs):
        spill_dirs.append(mkdtemp(*args, **kwargs))
        return spill_dirs[-1]

    monkeypatch.setattr(est.tempfile, "mkdtemp", recording)
    loads = []
    load = est.SpilledFrames.load

    def loading(self):
        loads.append(sorted(k for k, v in self.paths.items() if v is not None))
        return load(self)

    monkeypatch.setattr(est.SpilledFrames, "load", loading)
    split = _advanced(estimated_demo_template, tmp_path / "split", 1, monkeypatch)
    assert calls == [2, 2]                                  # [service] workers = 2 parts
    # the forked part's rows came through its spill folder, removed after each day
    assert len(spill_dirs) == 2 and not any(os.path.exists(d) for d in spill_dirs)
    assert len(loads) == 2 and all({"premium", "states", "runs"} <= set(k) for k in loads)
    for name in TABLES:
        pd.testing.assert_frame_equal(one[name], split[name], check_exact=True, obj=name)
    assert len(split["warnings"]) > 0


def test_a_forked_part_that_fails_stores_nothing_of_the_day(estimated_demo_template, tmp_path, monkeypatch):
    # this process writes its own part's results while the forked part still runs (one
    # transaction for the day): when the forked part fails, the part already written is
    # rolled back with the rest and the next update does the whole day
    import os

    from tracker.service import estimate_latest

    shutil.copytree(estimated_demo_template.parent, tmp_path / "s")
    store, config = open_store(tmp_path / "s" / "store.duckdb")
    monkeypatch.setattr(est, "ADVANCE_PART_MIN", 1)
    from tracker.seed_db import scenario as sc

    _append_days(store, sc.held_back_days(sc.generate())[:1])
    before = _tables(store)
    parent = os.getpid()
    original = estimate_latest.prepare_writes

    def failing_in_the_child(*args, **kwargs):
        if os.getpid() != parent:
            raise RuntimeError("the forked part failed")
        return original(*args, **kwargs)

    monkeypatch.setattr(est, "prepare_writes", failing_in_the_child)
    with pytest.raises(RuntimeError, match="the forked part failed"):
        est.update(store, config)
    _assert_unchanged(store, before)
    monkeypatch.setattr(est, "prepare_writes", original)
    summary = est.update(store, config)
    assert set(summary.kinds.values()) == {"advance"} and summary.rows_written > 0


def test_set_level_facts_come_from_this_process_and_its_failure_stops_the_day(
        estimated_demo_template, tmp_path, monkeypatch):
    # a split day takes the set-level facts once, in this process, after the forked part
    # has started (it runs its models meanwhile and reads them when it needs them); when
    # taking them fails, the forked part does not wait for ever and nothing is stored
    import os

    shutil.copytree(estimated_demo_template.parent, tmp_path / "s")
    store, config = open_store(tmp_path / "s" / "store.duckdb")
    monkeypatch.setattr(est, "ADVANCE_PART_MIN", 1)
    from tracker.seed_db import scenario as sc

    days = sc.held_back_days(sc.generate())[:2]
    _append_days(store, days[:1])
    before = _tables(store)
    parent, taken = os.getpid(), []
    original = est.set_context

    def failing(*args, **kwargs):
        taken.append(os.getpid())
        raise RuntimeError("the set-level facts failed")

    monkeypatch.setattr(est, "set_context", failing)
    with pytest.raises(RuntimeError, match="the set-level facts failed"):
        est.update(store, config)
    _assert_unchanged(store, before)

    def counted(*args, **kwargs):
        taken.append(os.getpid())
        return original(*args, **kwargs)

    taken.clear()
    monkeypatch.setattr(est, "set_context", counted)
    summary = est.update(store, config)
    assert set(summary.kinds.values()) == {"advance"} and summary.rows_written > 0
    assert taken == [parent]          # once in this process (the day itself is held equal to
                                      # one process's by the split test above)


def test_set_level_tests_are_the_stored_summaries_tests(estimated_demo_store):
    # set_context takes each advancing factor's mean test before its models run, from the
    # stored returns' sums and the new returns; the summary the advance then stores must
    # give the same test (the whole-history twin of the summary is held in
    # test_incremental_path.py against significance.newey_west_mean)
    from tracker.seed_db import scenario as sc

    store, config = estimated_demo_store
    _append_days(store, sc.held_back_days(sc.generate())[:1])
    inp, plans = est._read_inputs(store, config)
    assert plans and {p.kind for p in plans} == {"advance"}
    sctx = set_context(config, inp, plans)
    est.update(store, config)
    from tracker.service.estimate_latest import thresholds
    from tracker.service.factor_models import HINDSIGHT_ROWS
    from tracker.service.history_summary import sizes_for

    sizes = sizes_for(thresholds(config), HINDSIGHT_ROWS)
    with store.connect() as con:
        rows = con.execute("SELECT subject_id, state_json FROM filter_states WHERE model = 'premium'").fetchall()
    checked = 0
    for fid, text in rows:
        if fid not in {p.factor_id for p in plans}:
            continue
        stored = summary_from_state(json.loads(text), sizes, inp.freq[fid]).mean_test()
        want = sctx.tests[fid]
        assert (stored.status, stored.n_obs, stored.lags) == (want.status, want.n_obs, want.lags)
        assert [stored.mean, stored.se, stored.t_stat, stored.p_value] == [want.mean, want.se, want.t_stat, want.p_value]
        checked += 1
    assert checked == len(plans)


def test_parts_split_evenly_and_keep_order():
    items = list(range(10))
    parts = est._split(items, 3)
    assert [len(p) for p in parts] in ([3, 4, 3], [4, 3, 3], [3, 3, 4])
    assert sum(parts, []) == items
    assert est._split(items, 20) == [[i] for i in items]       # never an empty part
    assert est._split([], 2) == []
    # this process's own part (the first) can be given a smaller share
    for n, parts, first in ((500, 2, 0.8), (10, 3, 0.5), (3, 3, 0.1), (7, 2, 3.0)):
        split = est._split(list(range(n)), parts, first)
        assert sum(split, []) == list(range(n)) and all(split) and len(split) == parts
        others = [len(p) for p in split[1:]]
        assert abs(len(split[0]) - first * sum(others) / len(others)) <= 1.5


@pytest.mark.parametrize("n, workers, want", [(500, 2, 2), (100, 2, 1), (1000, 4, 4), (10, 2, 1)])
def test_advance_parts_need_enough_factors_each(n, workers, want):
    import dataclasses

    from tracker.config import config_from_dict

    config = config_from_dict({})
    config = dataclasses.replace(config, service=dataclasses.replace(config.service, workers=workers))
    assert est._advance_parts(config, list(range(n))) == want      # ADVANCE_PART_MIN = 64


def test_update_holds_the_store_for_a_day_and_lets_go_before_fits(estimated_demo_store):
    # a day's advance keeps one open of the store from its read to its exposures
    # (Store.hold); a run with fits to do closes it first, so another process is not kept
    # out of the file for the minutes a refit can take
    from tracker.seed_db import scenario as sc

    store, config = estimated_demo_store
    held_during = []
    _append_days(store, sc.held_back_days(sc.generate())[:1])
    summary = est.update(store, config, observer=lambda fid, t: held_during.append(store.is_held))
    assert set(summary.kinds.values()) == {"advance"}
    assert held_during and all(held_during)
    assert not store.is_held                                  # closed when the update ends

    class Watching(executor_mod.SerialExecutor):
        def map(self, fn, items, *, ordered=True):
            held_during.append(("map", store.is_held))
            return super().map(fn, items, ordered=ordered)

    held_during.clear()
    summary = est.update(store, config, refit={"VALUE"}, executor=Watching())
    assert summary.kinds.get("VALUE") == "refit"
    assert held_during[0] == ("map", False)
    assert not store.is_held


def test_a_forked_part_without_room_to_spill_sends_its_rows_through_the_pipe(
        estimated_demo_template, tmp_path, monkeypatch):
    def no_room(self, folder):
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(est.PartFrames, "spill", no_room)
    split = _advanced(estimated_demo_template, tmp_path / "split", 1, monkeypatch)
    monkeypatch.undo()
    one = _advanced(estimated_demo_template, tmp_path / "one", 10**6, monkeypatch)
    for name in TABLES:
        pd.testing.assert_frame_equal(one[name], split[name], check_exact=True, obj=name)
