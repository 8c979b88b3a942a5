"""The local process executor: input order kept, with a bounded number of tasks in flight."""

from __future__ import annotations

import os

from tracker.service.executor import LocalProcessExecutor


def _square_and_pid(x):
    return x * x, os.getpid()


def test_results_come_in_input_order_past_the_window():
    # 40 tasks against a window of 8: submission continues as results are taken
    out = list(LocalProcessExecutor(2).map(_square_and_pid, range(40)))
    assert [r for r, _ in out] == [i * i for i in range(40)]
    assert os.getpid() not in {pid for _, pid in out}          # ran in worker processes


def test_a_lazy_consumer_leaves_at_most_the_window_submitted(monkeypatch):
    # taking one result submits one more task: never more than the window outstanding
    from concurrent.futures import ProcessPoolExecutor

    submitted = []
    original = ProcessPoolExecutor.submit

    def counting(self, fn, *args, **kwargs):
        submitted.append(args[0])
        return original(self, fn, *args, **kwargs)

    monkeypatch.setattr(ProcessPoolExecutor, "submit", counting)
    gen = LocalProcessExecutor(2).map(_square_and_pid, range(40))
    assert next(gen)[0] == 0
    assert len(submitted) == 8 + 1                # the window, and one more for the taken result
    rest = list(gen)
    assert len(rest) == 39 and len(submitted) == 40
