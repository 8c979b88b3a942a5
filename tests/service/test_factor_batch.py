"""A day's advances in one vectorised pass (factor_batch.run_advances) against run_factor.

Reference twin: ``factor_models.run_factor``, factor by factor, on the same tasks: the
advance tasks of the estimated demo store after one more day, plus tasks made unusual on
purpose (a missing return, two new rows, a diffuse state), which must take the
per-factor path. Every output array, extra and stored state must agree to 1e-12
relative (the kernels are twin-tested in tests/estimation/test_batch_step.py; numpy's
log/exp may differ from math's in the last bit).
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest

from tracker.service import estimate as est
from tracker.service import factor_batch as fb
from tracker.service.factor_models import run_factor

from drop_helpers import append_scenario_days as _append_days

RTOL = 1e-12
ARRAYS = ("returns", "premium", "premium_var", "forecast_var", "vol_forecast", "std_error", "loglik_t",
          "snr", "regime_premium", "regime_premium_var", "regime_filtered", "regime_predicted")


def _close(a, b, where: str, rtol: float = RTOL) -> None:
    """Equal to ``rtol`` (0: to the last bit), NaN where NaN."""
    if isinstance(a, dict):
        assert set(a) == set(b), where
        for k in a:
            _close(a[k], b[k], f"{where}.{k}", rtol)
    elif a is None or isinstance(a, (bool, str)):
        assert a == b, where
    else:
        np.testing.assert_allclose(np.asarray(a, float), np.asarray(b, float), rtol=rtol, atol=0, err_msg=where)


@pytest.fixture()
def day_tasks(estimated_demo_store):
    from tracker.seed_db import scenario as sc

    store, config = estimated_demo_store
    _append_days(store, sc.held_back_days(sc.generate())[:1])
    inp, plans = est._read_inputs(store, config)
    settings = {**est._settings(config), "cold": False}
    return [est._task(inp, p, inp.freq[p.factor_id], settings) for p in plans if p.kind == "advance"]


def test_batched_advances_equal_run_factor(day_tasks, monkeypatch):
    monkeypatch.setattr(fb, "MIN_BATCH", 1)
    tasks = list(day_tasks)
    usual = [t for t in tasks if fb._batch_input(t) is not None]
    assert len(usual) >= 5                                   # the demo's daily factors
    # unusual tasks: a missing return, two rows, a diffuse premium state
    base = usual[0]
    missing = dataclasses.replace(base, factor_id="missing", returns=np.array([np.nan]))
    two = dataclasses.replace(base, factor_id="two", dates=np.repeat(base.dates, 2), returns=np.repeat(base.returns, 2))
    diffuse = dataclasses.replace(base, factor_id="diffuse",
                                  states={**base.states, "premium": {**base.states["premium"], "diffuse": True}})
    tasks += [missing, two, diffuse]
    assert all(fb._batch_input(t) is None for t in (missing, two, diffuse))
    batched_calls = []
    original = fb._run_batch
    monkeypatch.setattr(fb, "_run_batch", lambda ts, rows: batched_calls.append(len(ts)) or original(ts, rows))
    got = fb.run_advances(tasks)
    assert batched_calls == [len(usual)]
    assert [o.factor_id for o in got] == [t.factor_id for t in tasks]
    for task, out in zip(tasks, got):
        ref = run_factor(task)
        for name in ARRAYS:
            _close(getattr(out, name), getattr(ref, name), f"{task.factor_id}.{name}")
        assert (out.dates == ref.dates).all() and out.fits == ref.fits == ()
        assert out.params == ref.params and out.status == ref.status and out.message == ref.message
        _close(out.states, ref.states, f"{task.factor_id}.states")
        _close(out.extras, ref.extras, f"{task.factor_id}.extras")
        assert set(out.timings) == set(ref.timings)


def test_few_tasks_take_the_per_factor_path(day_tasks, monkeypatch):
    calls = []
    monkeypatch.setattr(fb, "_run_batch", lambda ts, rows: calls.append(ts) or [])
    out = fb.run_advances(day_tasks[: fb.MIN_BATCH - 1])
    assert not calls and len(out) == min(len(day_tasks), fb.MIN_BATCH - 1)


def test_a_factor_gets_the_same_bits_in_any_batch(day_tasks, monkeypatch):
    """A day split over processes batches each part on its own (batch=True for every part
    when the day batches): a factor's numbers must not depend on which others share its
    batch or on its place in it, to the last bit, or the split day would store something
    else than one process."""
    tasks = [t for t in day_tasks if fb._batch_input(t) is not None]
    assert len(tasks) >= 5
    whole = {o.factor_id: o for o in fb.run_advances(tasks, batch=True)}
    for part in (tasks[:2], tasks[::-1][:3], tasks[1:2]):
        for out in fb.run_advances(part, batch=True):
            ref = whole[out.factor_id]
            for name in ARRAYS:
                _close(getattr(out, name), getattr(ref, name), f"{out.factor_id}.{name}", 0.0)
            _close(out.states, ref.states, f"{out.factor_id}.states", 0.0)
            _close(out.extras, ref.extras, f"{out.factor_id}.extras", 0.0)
    # and batch=False is the per-factor path whatever the number of tasks
    calls = []
    original = fb._run_batch
    monkeypatch.setattr(fb, "_run_batch", lambda ts, rows: calls.append(len(ts)) or original(ts, rows))
    fb.run_advances(tasks, batch=False)
    assert calls == []
    fb.run_advances(tasks[:1], batch=True)
    assert calls == [1]
