"""The live loop without Textual: when it estimates, when it does not, retries, refit
requests, stopping, and the cancellable process executor."""

from __future__ import annotations

import threading
import time

import pytest
from ui_helpers import N_STORED, day, drop_text, insert_day, write_drop

from tracker.service.estimate import estimation_lock
from tracker.service.views import load_board
from tracker.ui.live import CancellableExecutor, EstimationCancelled, LiveLoop


def _loop(store, config, **kw):
    boards, activity = [], []
    loop = LiveLoop(store, config, on_board=boards.append,
                    on_activity=lambda text, done, total, busy: activity.append((text, done, total)), **kw)
    return loop, boards, activity


def _count_updates(monkeypatch):
    import tracker.service.estimate as est

    calls = []
    real = est.update

    def counting(*a, **k):
        calls.append(k.get("refit"))
        return real(*a, **k)

    monkeypatch.setattr(est, "update", counting)
    return calls


def test_first_pass_catches_up_then_idle_passes_do_not_estimate(small_store, monkeypatch):
    store, config = small_store
    calls = _count_updates(monkeypatch)
    insert_day(store, N_STORED + 1)                 # a row no estimate covers yet (no data version bump)
    loop, boards, activity = _loop(store, config, ingest=None)
    report = loop.run_pass()
    assert report.error == "" and len(calls) == 1
    assert all(r.estimate_date == day(N_STORED + 1) for r in loop.last_board.rows)
    assert any(total > 0 for _, _, total in activity)           # progress was reported
    assert boards[-1] is loop.last_board
    n_boards = len(boards)
    report = loop.run_pass()
    assert report.error == "" and len(calls) == 1                # nothing changed: no estimation
    assert len(boards) == n_boards                               # and no new board handed on


def test_an_applied_drop_file_triggers_estimation(small_store, monkeypatch):
    pytest.importorskip("tracker.ingest.inbox", reason="the ingest layer is not installed")
    store, config = small_store
    loop, boards, _ = _loop(store, config)
    loop.run_pass()
    calls = _count_updates(monkeypatch)
    write_drop(config.inbox_path(store.folder), "next.sql", drop_text(N_STORED + 1))
    report = loop.run_pass()
    assert report.applied == 1 and report.rejected == 0 and len(calls) == 1
    assert boards[-1].header.last_data_date == day(N_STORED + 1)
    assert all(r.estimate_date == day(N_STORED + 1) for r in boards[-1].rows)


def test_a_skipped_update_is_retried_on_the_next_pass(small_store):
    store, config = small_store
    insert_day(store, N_STORED + 1)
    loop, _, _ = _loop(store, config, ingest=None)
    with estimation_lock(store) as got:                          # as if another process were estimating
        assert got
        report = loop.run_pass()
    assert "another process" in report.estimation
    assert loop.last_board.rows[0].estimate_date == day(N_STORED)
    report = loop.run_pass()
    assert loop.last_board.rows[0].estimate_date == day(N_STORED + 1)


def test_refit_requests_merge_and_empty_means_all():
    loop = LiveLoop(None, None, on_board=print, on_activity=print, ingest=None)   # requests touch no store
    loop.request_refit({"A"})
    loop.request_refit({"B"})
    assert loop._take_refit() == {"A", "B"} and not loop.refit_pending()
    loop.request_refit({"A"})
    loop.request_refit(None)
    assert loop._take_refit() == set()


def test_stopping_abandons_an_estimation_before_it_writes(small_store):
    store, config = small_store
    insert_day(store, N_STORED + 1)
    version = load_board(store, config).version
    loop, _, _ = _loop(store, config, ingest=None)
    loop.stop.set()
    loop._need_update = True
    with pytest.raises(EstimationCancelled):
        loop._estimate(type("R", (), {"estimation": ""})(), None, None)
    assert load_board(store, config).version == version          # nothing written


def _slow_square(x: int) -> int:
    time.sleep(0.05 if x < 4 else 30)
    return x * x


def test_cancellable_executor_keeps_order_and_stops_at_once():
    stop = threading.Event()
    ex = CancellableExecutor(stop, workers=2, poll_s=0.05)
    assert list(ex.map(_slow_square, [1, 2, 3])) == [1, 4, 9]   # same as the serial map
    results = []
    start = time.monotonic()
    gen = ex.map(_slow_square, [1, 2, 3, 4, 5])
    with pytest.raises(EstimationCancelled):
        for value in gen:
            results.append(value)
            if len(results) == 3:
                stop.set()
    assert results == [1, 4, 9]
    assert time.monotonic() - start < 10                         # the 30 s tasks were terminated
