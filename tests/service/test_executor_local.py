"""The local process executor: input order kept, with a bounded number of tasks in flight."""

from __future__ import annotations

import os

from tracker.service.executor import LocalProcessExecutor


def _square_and_pid(x):
    return x * x, os.getpid()


def _slow_first(x):
    import time

    time.sleep(1.0 if x == 0 else 0.01)
    return x


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


def test_unordered_results_do_not_wait_behind_a_long_task():
    # the first task is long: unordered, the others come out before it, and all do
    out = list(LocalProcessExecutor(2).map(_slow_first, range(30), ordered=False))
    assert sorted(out) == list(range(30))
    assert out.index(0) > 10


def _mark_and_sleep(arg):
    import time
    from pathlib import Path

    folder, i = arg
    (Path(folder) / f"started-{i}").touch()
    time.sleep(0.01 if i == 0 else 0.5)
    return i


def test_stopping_early_cancels_the_tasks_not_started(tmp_path):
    # 20 tasks, a window of 8: after the first result the caller stops; the submitted
    # tasks not yet running are cancelled instead of run to completion at shutdown
    gen = LocalProcessExecutor(2).map(_mark_and_sleep, [(str(tmp_path), i) for i in range(20)])
    assert next(gen) == 0
    gen.close()
    started = len(list(tmp_path.glob("started-*")))
    # the first, two running and the pool's few pre-queued calls (workers + 1) may start;
    # without cancelling, all nine submitted (the window and one more) run
    assert started <= 6, started


# ------------------------------------------------------------------ fork_split


def test_fork_split_runs_the_parts_apart_and_returns_them_in_order():
    from tracker.service.executor import fork_split

    big = list(range(100_000))            # a closure over a large local: not pickled, inherited
    out = fork_split(lambda part: (sum(big[i] for i in part), os.getpid()), [[0, 1], [2, 3], [99_999]])
    assert [s for s, _ in out] == [1, 5, 99_999]
    pids = [p for _, p in out]
    assert pids[0] == os.getpid() and len(set(pids)) == 3      # the first part here, the rest forked


def test_fork_split_raises_a_childs_exception_here():
    import pytest

    from tracker.service.executor import fork_split

    def fail_in_second(part):
        if part == "b":
            raise ValueError("bad part b")
        return part

    with pytest.raises(ValueError, match="bad part b") as info:
        fork_split(fail_in_second, ["a", "b"])
    assert any("forked worker" in note for note in getattr(info.value, "__notes__", []))


def test_fork_split_reports_a_child_that_dies():
    import pytest

    from tracker.service.executor import fork_split

    def die_in_second(part):
        if part == 2:
            os._exit(3)
        return part

    with pytest.raises(RuntimeError, match="exit code 3"):
        fork_split(die_in_second, [1, 2])


def test_forked_parts_give_this_process_its_own_result_while_the_children_run(tmp_path):
    # the caller uses its own part's result (a day's update writes it) before the forked
    # parts finish: here the child waits for a file that the parent makes only after it
    # has its own result, so waiting for the children first would leave the child to give up
    import time

    from tracker.service.executor import forked_parts

    flag = tmp_path / "parent-has-its-result"

    def part(name):
        if name == "here":
            return "here", os.getpid()
        deadline = time.monotonic() + 20
        while not flag.exists():
            if time.monotonic() > deadline:
                return "gave up", os.getpid()
            time.sleep(0.01)
        return "saw the parent's result first", os.getpid()

    with forked_parts(part, ["here", "child"]) as results:
        own = next(results)
        flag.touch()
        rest = list(results)
    assert own == ("here", os.getpid())
    assert rest[0][0] == "saw the parent's result first" and rest[0][1] != os.getpid()


def test_forked_parts_left_early_stop_the_children():
    import time

    import pytest

    from tracker.service.executor import forked_parts

    started = time.monotonic()
    with pytest.raises(KeyError):
        with forked_parts(lambda p: time.sleep(60) if p else os.getpid(), [0, 1]) as results:
            next(results)
            raise KeyError("the caller failed with its own result")
    assert time.monotonic() - started < 30           # the sleeping child was stopped, not waited for


def test_fork_split_children_write_nothing_to_the_parents_terminal(capfd):
    import sys
    import warnings

    from tracker.service.executor import fork_split

    def noisy(part):
        print(f"printed by part {part}")
        print(f"to stderr by part {part}", file=sys.stderr)
        warnings.warn(f"warned by part {part}")
        return part

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")        # this process's own part: not the point here
        assert fork_split(noisy, [0, 1, 2]) == [0, 1, 2]
    out, err = capfd.readouterr()
    assert "part 0" in out                     # the part run here prints as usual
    assert "part 1" not in out + err and "part 2" not in out + err
