"""A day's advance of many factors in one vectorised pass (the common case of
:func:`tracker.service.factor_models.run_factor`).

:func:`run_advances` takes the advance tasks of a run and returns one
:class:`FactorOutput` per task, in order. The tasks that are the everyday case -- one new
valid row, an EWMA variance already past its warm-up, non-diffuse premium, fragility and
hindsight states, a two-regime model and its Kim filter -- are advanced together through
:mod:`tracker.estimation.batch_step`; every other task (a missing return, a state still
diffuse, GARCH, three regimes, several new rows) goes through ``run_factor`` unchanged.
The outputs and stored states have the shapes and keys ``run_factor`` gives them;
``tests/service/test_factor_batch.py`` holds the two paths equal.
"""

from __future__ import annotations

import math
import time

import numpy as np

from tracker.estimation import batch_step as bs
from tracker.estimation.kim_filter import KimState
from tracker.estimation.local_level import FilterState
from tracker.estimation.markov_regimes import RegimeFilterState
from tracker.estimation.volatility import VarianceState
from tracker.service.factor_models import (
    HINDSIGHT_ROWS,
    MODEL_PREMIUM,
    MODEL_REGIME_PREMIUM,
    MODEL_REGIMES,
    MODEL_VOL,
    STATE_Q_DOUBLE,
    STATE_Q_HALF,
    STATE_TAIL,
    FactorOutput,
    FactorTask,
    run_factor,
)

# below this many batchable tasks the per-factor path is as fast
MIN_BATCH = 8


def run_advances(tasks: list[FactorTask], batch: bool | None = None) -> list[FactorOutput]:
    """``[run_factor(t) for t in tasks]``, the everyday ones in one vectorised pass.

    ``batch``: whether the everyday tasks take the vectorised pass (None: when there are at
    least ``MIN_BATCH`` of them). The two paths agree to rounding, not to the last bit, so
    a day split over processes decides once for all its parts (``batch``), and each factor
    gets the numbers one process would have given it.
    """
    inputs = {}
    for i, task in enumerate(tasks):
        got = _batch_input(task)
        if got is not None:
            inputs[i] = got
    if not inputs or not (len(inputs) >= MIN_BATCH if batch is None else batch):
        return [run_factor(t) for t in tasks]
    batched = _run_batch([tasks[i] for i in inputs], list(inputs.values()))
    out, it = [], iter(batched)
    for i, task in enumerate(tasks):
        out.append(next(it) if i in inputs else run_factor(task))
    return out


def _batch_input(task: FactorTask) -> dict | None:
    """The numbers one task contributes to the batch, or None when it is not the everyday case."""
    if task.refit or np.size(task.returns) != 1:
        return None
    y = float(np.asarray(task.returns, dtype=float)[0])
    p, s = task.params, task.states
    try:
        vol, prem, reg, kim = p[MODEL_VOL], p[MODEL_PREMIUM], p[MODEL_REGIMES], p[MODEL_REGIME_PREMIUM]
        vs, ps, rs, ks = s[MODEL_VOL], s[MODEL_PREMIUM], s[MODEL_REGIMES], s[MODEL_REGIME_PREMIUM]
        half, double, tail = s[STATE_Q_HALF], s[STATE_Q_DOUBLE], s[STATE_TAIL]
        if vol.get("kind", "ewma") != "ewma" or not vs["started"] or int(reg.get("k_regimes", 0)) != 2:
            return None
        if any(st.get("unavailable") or st["diffuse"] for st in (ps, half, double, tail["prior"], ks)):
            return None
        q, c, h = float(prem["q"]), float(prem["c"]), float(vs["h_next"])
        row = {
            "y": y, "h": h, "lam": float(vol["lam"]), "q": q, "c": c,
            "a": float(ps["mean"]), "P": float(ps["var"]),
            "a_half": float(half["mean"]), "P_half": float(half["var"]),
            "a_double": float(double["mean"]), "P_double": float(double["var"]),
            "tail_a": float(tail["prior"]["mean"]), "tail_P": float(tail["prior"]["var"]),
            "tail_y": [float(v) for v in tail["y"]], "tail_h": [float(v) for v in tail["h"]],
            "r_pred": [float(v) for v in rs["predicted"]],
            "r_means": [float(v) for v in reg["means"]], "r_vars": [float(v) for v in reg["variances"]],
            "r_trans": [[float(v) for v in r] for r in reg["transition"]],
            "k_prob": [float(v) for v in ks["prob"]], "k_a": [float(v) for v in ks["mean"]],
            "k_P": [float(v) for v in ks["var"]], "k_q": float(kim["q"]),
            "k_c": [float(v) for v in kim["c"]], "k_m": [float(v) for v in kim["m"]],
            "k_trans": [[float(v) for v in r] for r in kim["transition"]],
        }
    except (KeyError, TypeError, ValueError):
        return None
    numbers = [row[k] for k in ("y", "h", "lam", "q", "c", "a", "P", "a_half", "P_half", "a_double",
                                "P_double", "tail_a", "tail_P", "k_q")]
    if not all(math.isfinite(v) for v in numbers) or not (h > 0.0 and c > 0.0 and q >= 0.0):
        return None
    if (len(row["tail_y"]) != HINDSIGHT_ROWS or len(row["tail_h"]) != HINDSIGHT_ROWS
            or not all(math.isfinite(v) for v in row["tail_y"])
            or not all(math.isfinite(v) and v > 0.0 for v in row["tail_h"])):
        return None
    if (len(row["r_pred"]) != 2 or len(row["k_prob"]) != 2 or len(row["k_a"]) != 2 or len(row["k_c"]) != 2
            or not all(math.isfinite(v) for k in ("k_a", "k_P", "r_pred") for v in row[k])):
        return None
    return row


def _run_batch(tasks: list[FactorTask], rows: list[dict]) -> list[FactorOutput]:
    t0 = time.perf_counter()

    def col(key):
        return np.array([r[key] for r in rows], dtype=float)

    y, h, lam, q, c = col("y"), col("h"), col("lam"), col("q"), col("c")
    h_next = bs.ewma_step(h, y, lam)
    t1 = time.perf_counter()
    ll = bs.local_level_step(col("a"), col("P"), q, c, y, h)
    forecast_var = ll["var"] + q + c * h_next
    vol_forecast = np.sqrt(h_next * c)
    snr = q / (c * h)
    t2 = time.perf_counter()
    half = bs.local_level_step(col("a_half"), col("P_half"), q * 0.5, c, y, h)
    double = bs.local_level_step(col("a_double"), col("P_double"), q * 2.0, c, y, h)
    ty = np.column_stack([col("tail_y"), y])
    th = np.column_stack([col("tail_h"), h])
    # the row leaving the tail moves the prior; the smoother runs over the rest
    prior = bs.local_level_step(col("tail_a"), col("tail_P"), q, c, ty[:, 0], th[:, 0])
    ty, th = ty[:, 1:], th[:, 1:]
    hindsight = bs.local_level_smooth(prior["mean"], prior["var"], q, c, ty, th)
    t3 = time.perf_counter()
    filtered, predicted, r_ll = bs.hamilton_step(col("r_pred"), col("r_means"), col("r_vars"),
                                                 col("r_trans"), y)
    t4 = time.perf_counter()
    kim = bs.kim_two_step(col("k_prob"), col("k_a"), col("k_P"), col("k_q"), col("k_c"), col("k_m"),
                          col("k_trans"), y, h)
    t5 = time.perf_counter()
    n = len(rows)
    share = {MODEL_VOL: (t1 - t0) / n, MODEL_PREMIUM: (t2 - t1) / n, "extras": (t3 - t2) / n,
             MODEL_REGIMES: (t4 - t3) / n, MODEL_REGIME_PREMIUM: (t5 - t4) / n}
    outs = []
    for i, task in enumerate(tasks):
        s = task.states
        states = dict(s)
        vs = s[MODEL_VOL]
        states[MODEL_VOL] = VarianceState(h_next=float(h_next[i]), n_obs=int(vs["n_obs"]) + 1, started=True,
                                          sum_sq=float(vs["sum_sq"])).to_dict()
        states[MODEL_PREMIUM] = _one_row_later(s[MODEL_PREMIUM], ll["mean"][i], ll["var"][i])
        states[STATE_Q_HALF] = _one_row_later(s[STATE_Q_HALF], half["mean"][i], half["var"][i])
        states[STATE_Q_DOUBLE] = _one_row_later(s[STATE_Q_DOUBLE], double["mean"][i], double["var"][i])
        states[STATE_TAIL] = {"prior": _one_row_later(s[STATE_TAIL]["prior"], prior["mean"][i], prior["var"][i]),
                              "y": ty[i].tolist(), "h": th[i].tolist()}
        rstate = s[MODEL_REGIMES]
        states[MODEL_REGIMES] = RegimeFilterState(predicted[i], filtered[i], int(rstate["n_obs"]) + 1,
                                                  float(rstate["loglik"]) + float(r_ll[i])).to_dict()
        ks = s[MODEL_REGIME_PREMIUM]
        states[MODEL_REGIME_PREMIUM] = KimState(
            prob=tuple(float(v) for v in kim["prob"][i]), mean=tuple(float(v) for v in kim["a"][i]),
            var=tuple(float(v) for v in kim["P"][i]), n_rows=int(ks["n_rows"]) + 1,
            n_obs=int(ks["n_obs"]) + 1, diffuse=False).to_dict()
        outs.append(FactorOutput(
            factor_id=task.factor_id, fits=(), params=dict(task.params), states=states,
            dates=np.asarray(task.dates), returns=y[i:i + 1],
            premium=ll["mean"][i:i + 1], premium_var=ll["var"][i:i + 1],
            forecast_var=forecast_var[i:i + 1], vol_forecast=vol_forecast[i:i + 1],
            std_error=ll["std_error"][i:i + 1], loglik_t=ll["loglik_t"][i:i + 1], snr=snr[i:i + 1],
            regime_premium=kim["mean"][i:i + 1], regime_premium_var=kim["var"][i:i + 1],
            regime_filtered=filtered[i:i + 1], regime_predicted=predicted[i:i + 1],
            status={}, message={},
            extras={"q_half": float(half["mean"][i]), "q_double": float(double["mean"][i]),
                    "hindsight": hindsight[i]},
            timings=dict(share),
        ))
    return outs


def _one_row_later(state: dict, mean: float, var: float) -> dict:
    """A local-level filter state (dict) after one more valid row ending at ``mean``, ``var``."""
    return FilterState(mean=float(mean), var=float(var), n_rows=int(state["n_rows"]) + 1,
                       n_obs=int(state["n_obs"]) + 1, diffuse=False).to_dict()
