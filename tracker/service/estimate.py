"""Bringing the stored estimates up to date: fit rarely, filter often, never rewrite the past.

One call, :func:`update`, does whatever the stored data require, per factor:

* ``backfill`` -- no estimates yet: fit on the whole history and store the filtered
  estimate of every date (vintage 1). Parameters then come from the whole sample, which
  the fit record's ``data_through`` makes visible; the *states* are still real-time.
* ``advance`` -- new rows after the saved filter state: filter just those rows at the
  stored parameters, from the saved state (cost proportional to the new rows).
* ``refit`` -- on request, on schedule (``[models] refit_every_days`` new rows since the
  last fit) or after a DRIFT warning: re-estimate warm-started from the previous
  parameters, re-run the filters to the end of the data and store estimates for the new
  dates only; stored past estimates are kept as they were known.
* ``rederive`` -- a revision changed a stored return: refit, mark the stored estimates
  from the revised date on as superseded (kept, ``superseded_at`` set) and write a new
  vintage from that date. The run is recorded in ``estimation_runs``.

Inputs are read on one short connection, the models run with no connection open (in
worker processes for refits), and the results are written in one transaction (a refit of
many factors: one per chunk of factors, see ``STREAM_CHUNK``). A file
lock beside the store keeps two processes from estimating at once; the loser skips, and
the winner's results reach it through the store.
"""

from __future__ import annotations

import dataclasses
import fcntl
import gc
import math
import os
import pickle
import shutil
import struct
import sys
import tempfile
import time
from collections.abc import Callable
from contextlib import contextmanager, nullcontext, suppress
from dataclasses import dataclass, field
from datetime import datetime

import numpy as np
import pandas as pd

from tracker.config import Config
from tracker.estimation import warning_rules as wr
from tracker.estimation.market_regime import MarketRegimeFit
from tracker.service import market as market_mod
from tracker.service.assets import update_exposures
from tracker.service.estimate_io import (
    BOOK_KEY,
    FrameBatch,
    Inputs,
    as_day,
    insert_frame,
    read_meta,
    read_stamps,
    read_returns,
)
from tracker.service.estimate_latest import (
    HISTORY_KEY,
    SetContext,
    Writes,
    current_summary,
    has_extras,
    prepare_writes,
    prior_head,
    set_context,
    thresholds,
)
from tracker.service.executor import Executor, SerialExecutor, executor_for, forked_parts, one_blas_thread
from tracker.service.factor_models import (
    FACTOR_MODELS,
    HINDSIGHT_ROWS,
    MODEL_PREMIUM,
    MODEL_REGIMES,
    FactorOutput,
    FactorTask,
    dumps,
    loads,
)
from tracker.service.factor_batch import MIN_BATCH, run_advances
from tracker.service.factor_warnings import run_factor_with_warnings
from tracker.service.history_summary import sizes_for
from tracker.store.connection import Store
from tracker.store.sqlfiles import sql

Progress = Callable[[int, int, str], None]
_Inputs = Inputs                  # the name the bench and older callers use


@dataclass(frozen=True)
class Plan:
    factor_id: str
    kind: str                         # backfill, advance, refit, rederive
    reason: str
    emit_from: np.datetime64 | None   # first date to store
    vintage: int


@dataclass
class RunSummary:
    kinds: dict = field(default_factory=dict)   # factor_id -> kind
    rows_written: int = 0
    skipped: str = ""
    timings: dict = field(default_factory=dict)  # phase -> seconds: read, fits, filters, market, write, exposures
    row_counts: dict | None = None               # factor_id -> stored rows, as the run read them

    def describe(self) -> str:
        if self.skipped:
            return self.skipped
        if not self.kinds:
            return "estimates are up to date"
        by_kind: dict[str, list[str]] = {}
        for f, k in self.kinds.items():
            by_kind.setdefault(k, []).append(f)
        parts = [f"{k} {len(v)}" for k, v in sorted(by_kind.items())]
        return f"estimated {', '.join(parts)}; {self.rows_written} estimate rows written"


@contextmanager
def estimation_lock(store: Store):
    """Non-blocking cross-process lock; yields False when another process holds it."""
    path = store.folder / ".estimation.lock"
    fd = os.open(path, os.O_CREAT | os.O_RDWR, 0o644)
    try:
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            yield False
            return
        try:
            yield True
        finally:
            fcntl.flock(fd, fcntl.LOCK_UN)
    finally:
        os.close(fd)


def _settings(config: Config) -> dict:
    return dataclasses.asdict(config.models)


def _thresholds(config: Config) -> wr.WarningThresholds:
    return thresholds(config)


def _plan(inp: Inputs, config: Config, refit_request: set[str] | None, only: set[str] | None) -> list[Plan]:
    plans = []
    every = config.models.refit_every_days
    for fid in inp.factors["factor_id"].tolist():
        if only is not None and fid not in only:
            continue
        row = inp.rows.get(fid)
        if row is None:
            continue
        state = inp.states.get((fid, MODEL_PREMIUM))
        vintage = int(inp.vintages.get(fid, 0))
        requested = refit_request is not None and (not refit_request or fid in refit_request)
        if state is None:
            plans.append(Plan(fid, "backfill", "initial", row.first, max(vintage, 0) + 1))
            continue
        through = as_day(state["through_date"])
        n_known = state["state"].get(MODEL_PREMIUM, {}).get("n_rows")
        if fid in inp.revisions:
            first = np.datetime64(pd.Timestamp(inp.revisions[fid]).date(), "D")
            plans.append(Plan(fid, "rederive", "revision", first, vintage + 1))
        elif n_known is not None and row.n_before != n_known:
            plans.append(Plan(fid, "rederive", "rows inserted before the filter state", row.first, vintage + 1))
        elif row.last > through:
            if requested:
                plans.append(Plan(fid, "refit", "request", through + 1, vintage))
            elif row.since_fit >= every:
                plans.append(Plan(fid, "refit", "schedule", through + 1, vintage))
            elif "DRIFT" in inp.latest_codes.get(fid, set()):
                plans.append(Plan(fid, "refit", "drift", through + 1, vintage))
            elif _short_fit_now_estimable(inp, fid, row, config):
                plans.append(Plan(fid, "refit", "enough data now", through + 1, vintage))
            else:
                plans.append(Plan(fid, "advance", "new rows", through + 1, vintage))
        elif requested:
            plans.append(Plan(fid, "refit", "request", None, vintage))
    return plans


def _short_fit_now_estimable(inp: Inputs, fid: str, row, config: Config) -> bool:
    """A model that had too little data gets refit once the history is long enough."""
    needed = {MODEL_PREMIUM: config.models.min_obs, MODEL_REGIMES: 20 * (config.models.regimes * (config.models.regimes + 1))}
    for model, n_min in needed.items():
        rec = inp.fits.get((fid, model))
        if rec is not None and rec["status"] == "too_little_data" and row.n_finite >= n_min:
            return True
    return False


def _read_inputs(store: Store, config: Config, refit: set[str] | None = None,
                 only: set[str] | None = None, *, market: bool = True) -> tuple[Inputs, list[Plan]]:
    """Everything the run needs, on one short connection, and the plans."""
    sizes = sizes_for(_thresholds(config), HINDSIGHT_ROWS)
    with store.connect() as con:
        inp = read_meta(con, verify=refit is not None)    # a refit request recounts every history
        inp.freq = dict(zip(inp.factors["factor_id"], inp.factors["frequency"]))
        plans = _plan(inp, config, refit, only)
        planned = {p.factor_id: p for p in plans}
        full = {p.factor_id for p in plans if p.kind != "advance"}
        history = {p.factor_id for p in plans if p.kind in ("refit", "rederive")}
        for p in plans:
            if p.kind == "advance" and (prior_head(inp, p.factor_id, sizes) is None
                                        or not has_extras(inp.states.get((p.factor_id, MODEL_PREMIUM)))):
                full.add(p.factor_id)        # fallback: the whole-history path
                history.add(p.factor_id)
        for fid in inp.rows:
            if fid not in planned and current_summary(inp, fid, sizes) is None:
                full.add(fid)                # its mean test needs the whole series
        read_returns(con, inp, full, history)
        market_needed = bool(plans) or (refit is not None) or not market_mod.has_state(inp.states)
        if market and market_needed:
            inp.market = market_mod.read_market_input(
                con, inp, refit_all=refit is not None and not refit,
                rederive=any(p.kind == "rederive" for p in plans), config=config)
    return inp, plans


def _params_of(inp: Inputs, fid: str) -> dict:
    out = {}
    for model in FACTOR_MODELS:
        rec = inp.fits.get((fid, model))
        if rec is not None and rec["status"] == "ok":
            out[model] = loads(rec["params_json"])
    return out


def _task(inp: Inputs, plan: Plan, frequency: str, settings: dict) -> FactorTask:
    dates, values = inp.returns.get(plan.factor_id, (np.empty(0, "datetime64[D]"), np.empty(0)))
    params = _params_of(inp, plan.factor_id)
    if plan.kind == "advance":
        state = {k: v for k, v in inp.states[(plan.factor_id, MODEL_PREMIUM)]["state"].items()
                 if k not in (HISTORY_KEY, BOOK_KEY)}
        keep = dates >= plan.emit_from
        return FactorTask(plan.factor_id, frequency, dates[keep], values[keep], settings,
                          refit=False, params=params, states=state, emit_from=plan.emit_from)
    return FactorTask(plan.factor_id, frequency, dates, values, settings, refit=True,
                      params=params, emit_from=plan.emit_from)


def update(
    store: Store,
    config: Config,
    *,
    refit: set[str] | None = None,
    only: set[str] | None = None,
    progress: Progress | None = None,
    executor: Executor | None = None,
    observer: Callable[[str, dict], None] | None = None,
    cold: bool = False,
) -> RunSummary:
    """Bring estimates up to date with the stored data.

    Parameters
    ----------
    refit : set of str, optional
        Factors to refit on request; an empty set means all factors.
    only : set of str, optional
        Restrict the run to these factors.
    progress : callable(done, total, label), optional
    executor : Executor, optional
        Where the fits run (default: local processes for refits, this process otherwise).
    observer : callable(factor_id, timings), optional
        Sees every factor's model timings (seconds per model) before its results are
        written; the benchmark sums them.
    cold : bool
        Refits start afresh (multi-start, default starting points) instead of from the
        parameters in force, and a market refit re-selects its number of states. A
        first fit is always cold.
    """
    # held: a day's read, write and exposures share one open of the store; a run with fits
    # to do lets go of it before they start (see Store.hold)
    with estimation_lock(store) as acquired, store.hold():
        if not acquired:
            return RunSummary(skipped="another process is estimating; its results will appear when it finishes")
        summary = _update_locked(store, config, refit, only, progress, executor, observer, cold)
        t0 = time.perf_counter()
        n = update_exposures(store, config, row_counts=summary.row_counts)
        summary.timings["exposures"] = time.perf_counter() - t0
        if n:
            summary.kinds["*exposures*"] = "advance"
            summary.rows_written += n
        return summary


def _update_locked(store, config, refit, only, progress, executor, observer=None,
                   cold: bool = False) -> RunSummary:
    started = datetime.now()
    clock = [time.perf_counter()]
    timings: dict[str, float] = {}

    def lap(name: str) -> None:
        now = time.perf_counter()
        timings[name] = now - clock[0]
        clock[0] = now

    # parsing the states makes a few hundred thousand objects and no cycles: the collector
    # would re-scan them again and again while they are made (~0.04 s of a 500-factor day)
    with _collector_paused():
        inp, plans = _read_inputs(store, config, refit, only)
    lap("read")
    # The parsed inputs (a few hundred thousand objects at 500 factors) live to the end of
    # the run; frozen, the collector stops re-scanning them on every collection while the
    # run allocates (~0.1 s of a 500-factor day). New objects are still collected.
    gc.freeze()
    try:
        summary = _estimate_and_write(store, config, inp, plans, refit, progress, executor, observer, cold,
                                      started, lap, timings)
    finally:
        gc.unfreeze()
    summary.row_counts = {f: r.n_rows for f, r in inp.rows.items()}
    return summary


@contextmanager
def _collector_paused():
    was = gc.isenabled()
    gc.disable()
    try:
        yield
    finally:
        if was:
            gc.enable()


def _estimate_and_write(store, config, inp, plans, refit, progress, executor, observer, cold,
                        started, lap, timings) -> RunSummary:
    if not plans and inp.market is None:
        return RunSummary(kinds={}, timings=timings)
    settings = {**_settings(config), "cold": bool(cold)}
    # the advances' tasks are made where they run (a forked part parses its own factors'
    # parameters: ~0.04 s of a 500-factor day out of this process)
    heavy = [_task(inp, p, inp.freq[p.factor_id], settings) for p in plans if p.kind != "advance"]
    light_plans = [p for p in plans if p.kind == "advance"]
    total = len(plans) + 1
    done = 0
    outputs: dict[str, FactorOutput] = {}
    if progress:
        progress(0, total, "estimating")
    th = _thresholds(config)
    # a due market fit's EM runs (one per number of states and start) go to the workers with
    # the factors' fits, first (the longest tasks), so they run beside them rather than
    # after them on one core; the fit is put together here when the last run is in
    market_task = market_mod.fit_task(inp, config, cold=cold) if heavy else None
    market_fit, market_prep, market_work, market_runs = None, None, [], []
    if market_task is not None:
        market_prep = market_task.prepare()
        if isinstance(market_prep, MarketRegimeFit):     # nothing to fit: the failure is the fit
            market_fit = market_prep
        else:
            market_work = market_mod.run_tasks(market_task, market_prep)
            if not market_work:     # no candidate with enough data: nothing to wait for
                market_fit = market_mod.finish_fit(market_task, market_prep, [])
    work = market_work + [(t, th) for t in heavy]
    runner = executor or (executor_for(config) if len(work) > 1 else SerialExecutor())
    # A refit of many factors (and nothing else) is written in chunks as the fits arrive,
    # each chunk in its own transaction, so memory holds a chunk's outputs, not every
    # factor's whole-history arrays and per-date warnings (at 100 factors x 15,000 days
    # these were 2.4 GB). Every factor's estimates, state, fits and warnings still land
    # together; the set-level tests behind the latest warnings come from the histories,
    # not from the outputs, so they are the same in every chunk. No chunk is written
    # before the market's fit is in, and the market goes with the first chunk: a run that
    # fails later has then re-derived the market already (a revision's factor written in
    # an early chunk no longer asks for it). Results are taken as they finish, so the
    # long market fit holds one worker without stalling the others.
    stream = not light_plans and len(heavy) > STREAM_CHUNK
    detail: dict[str, float] = {}
    rows = 0
    by_id = {p.factor_id: p for p in plans}
    market = None
    market_due = True

    def market_once():
        """The market's output, for the first write that asks (None after that)."""
        nonlocal market, market_due
        if not market_due:
            return None
        market_due = False
        market = market_mod.run_market(inp, config, cold=cold, refit_all=refit is not None and not refit,
                                       rederive=any(p.kind == "rederive" for p in plans), fit=market_fit)
        return market

    parts = _split(light_plans, _advance_parts(config, light_plans), OWN_PART_SHARE)
    # the vectorised pass or the per-factor one, decided for the day from its number of
    # advances, not for each part (they agree to rounding): a split day then stores what
    # one process would; the tasks the batch cannot take still go one by one
    batch = len(light_plans) >= MIN_BATCH
    # A day of advances split over processes takes the set-level facts (~0.05-0.08 s for
    # 500 factors) in this process after the forked parts have started, so that they run
    # their models meanwhile (see _SharedContext); any other run takes them first.
    shared = _SharedContext(lambda: set_context(config, inp, plans), len(parts) - 1) \
        if not work and len(parts) > 1 else None
    sctx = set_context(config, inp, plans) if shared is None else None
    prepared = Writes()
    if work:
        store.let_go()      # fits take seconds to minutes: other processes may use the store meanwhile
    # BLAS on one thread here too while the workers run: OpenBLAS's second thread, waking
    # for each small product on a core the workers hold, made this process's warnings of a
    # factor ~0.03 s instead of ~0.015 s, and its spinning took time from the workers
    with one_blas_thread() if work else nullcontext():
        for out in runner.map(run_refit_item, work, ordered=False):
            if not isinstance(out, FactorOutput):
                market_runs.append(out)
                if len(market_runs) == len(market_work):
                    market_fit = market_mod.finish_fit(market_task, market_prep, market_runs)
                continue
            outputs[out.factor_id] = out
            if observer is not None:
                observer(out.factor_id, out.timings)
            done += 1
            if progress:
                progress(done, total, f"fitted {out.factor_id}")
            # its latest-date warnings and rows, while the workers fit the rest (this process
            # only waits for them meanwhile: ~0.03 s a factor over 15,000 days that no longer
            # comes after the last fit). Each refit plan is prepared alone, in a chunked
            # refit as in one write, so its misfit tests take statsmodels one by one (the
            # batched twin of an advance day agrees with it to rounding)
            t_prep = time.perf_counter()
            prepared.join(prepare_writes(config, inp, [by_id[out.factor_id]],
                                         {out.factor_id: out}, sctx))
            detail["write_warnings"] = detail.get("write_warnings", 0.0) + time.perf_counter() - t_prep
            if stream and len(outputs) >= STREAM_CHUNK and (market_task is None or market_fit is not None):
                rows += _write(store, config, inp, [by_id[f] for f in outputs], outputs, market_once(),
                               started, detail, writes=prepared)
                outputs.clear()
                prepared = Writes()
    lap("fits")
    # the refits not written as they came, each prepared as it came (the advances are
    # prepared in their parts, below)
    rest = [p for p in plans if p.factor_id in outputs]
    writes = prepared

    def advance(part: list[Plan]) -> tuple[dict, Writes]:
        if shared is not None:
            shared.publish()
        outs = {o.factor_id: o for o in run_advances([_task(inp, p, inp.freq[p.factor_id], settings)
                                                      for p in part], batch=batch)}
        # only what the caller needs travels back from a forked part: its rows for each
        # table, as a few Arrow columns, and its timings
        # (a part with a new fit, whose id the store gives, sends its writes instead)
        part_writes = prepare_writes(config, inp, part, outs, sctx if shared is None else shared.get())
        if all(_framed(p, part_writes) for p in part):
            frames = part_frames(inp, part, part_writes, started)
            if shared is not None and shared.in_forked_part():
                try:
                    frames = frames.spill(shared.spill_dir)
                except OSError:         # no room there: through the pipe, as before
                    pass
            return {f: o.timings for f, o in outs.items()}, frames
        return {f: o.timings for f, o in outs.items()}, part_writes

    def count(part_timings: dict) -> None:
        nonlocal done
        for fid, model_timings in part_timings.items():
            if observer is not None:
                observer(fid, model_timings)
            done += 1
            if progress and (done % 50 == 0 or done == len(plans)):
                progress(done, total, f"filtered {fid}")

    if not parts:
        lap("filters")
        last_market = market_once()
        lap("market")
        if not plans and market is None:
            return RunSummary(kinds={}, timings=timings)
        if progress:
            progress(total, total, "writing results")
        if rest or last_market is not None:
            rows += _write(store, config, inp, rest, outputs, last_market, started, detail, writes=writes)
    else:
        # A day's advances: this process stores its own part's results while the forked
        # parts still run, then each forked part's as it arrives, all in one transaction
        # (at 500 factors the write of a part is ~0.06 s that no longer waits for the others)
        with shared or nullcontext(), forked_parts(advance, parts) as results:
            own_timings, own_writes = next(results)
            count(own_timings)
            last_market = market_once()
            with _RunWriter(store, inp, started, detail) as writer:
                if rest:
                    writer.add(rest, writes)
                writer.add_part(parts[0], own_writes)
                for part, (part_timings, part_writes) in zip(parts[1:], results):
                    count(part_timings)
                    writer.add_part(part, part_writes)
                lap("filters")
                if progress:
                    progress(total, total, "writing results")
                writer.finish(last_market)
            rows += writer.written
        rest += light_plans
    lap("write")
    timings.update(detail)
    kinds = {p.factor_id: p.kind for p in plans}
    if market is not None and market.emitted:
        kinds[market_mod.MARKET] = market.kind
    return RunSummary(kinds=kinds, rows_written=rows, timings=timings)


class _SharedContext:
    """A split day's :class:`SetContext`, computed once in this process and read by the
    forked parts when they need it; and the folder where the forked parts leave their
    rows (:class:`SpilledFrames`), removed with everything in it at the end of the day.

    The set-level facts (every factor's mean test and the tracked-set adjusted p-values)
    are needed only for the warnings, after a part's models have run. This process takes
    them in its own part (``get`` there computes them), after the children have started:
    they run their models meanwhile instead of waiting ~0.05-0.08 s for them. The value
    goes to an unlinked temporary file the children inherit; one 8-byte length per child
    on a pipe (a write that small is atomic) tells each that it is complete. A child whose
    parent failed first is stopped by :func:`executor.forked_parts` (or reads the end of
    the pipe and fails).
    """

    def __init__(self, compute: Callable[[], SetContext], children: int) -> None:
        self._compute = compute
        self._children = children
        self._pid = os.getpid()
        self._value: SetContext | None = None

    def __enter__(self) -> _SharedContext:
        self._file = tempfile.TemporaryFile()
        self._read, self._write = os.pipe()
        shm = "/dev/shm"
        self.spill_dir = tempfile.mkdtemp(prefix="tracker-day-", dir=shm if os.access(shm, os.W_OK) else None)
        return self

    def __exit__(self, *exc) -> None:
        os.close(self._read)
        os.close(self._write)
        self._file.close()
        shutil.rmtree(self.spill_dir, ignore_errors=True)

    def in_forked_part(self) -> bool:
        return os.getpid() != self._pid

    def publish(self) -> None:
        """In this process, before its own part's models: compute and hand over the
        facts (nothing in a forked part, whose models run meanwhile)."""
        if os.getpid() == self._pid:
            self.get()

    def get(self) -> SetContext:
        if self._value is not None:
            return self._value
        if os.getpid() == self._pid:
            self._value = self._compute()
            data = pickle.dumps(self._value, protocol=pickle.HIGHEST_PROTOCOL)
            fd = self._file.fileno()
            os.pwrite(fd, data, 0)
            for _ in range(self._children):
                os.write(self._write, struct.pack("<Q", len(data)))
            return self._value
        os.close(self._write)              # a forked part: the parent's end closing is an EOF
        head = os.read(self._read, 8)
        if len(head) != 8:
            raise RuntimeError("the run's set-level facts never came from the parent process")
        size = struct.unpack("<Q", head)[0]
        fd, chunks, got = self._file.fileno(), [], 0
        while got < size:
            chunk = os.pread(fd, size - got, got)
            if not chunk:
                raise RuntimeError("the run's set-level facts were cut short")
            chunks.append(chunk)
            got += len(chunk)
        self._value = pickle.loads(b"".join(chunks))
        return self._value


# factors per write of a large refit (see _estimate_and_write)
STREAM_CHUNK = 24
# advances per forked part of a day's update: below this a part costs more in the fork
# and in returning its results (~10 ms) than it saves (~1.5 ms a factor)
ADVANCE_PART_MIN = 64


def _advance_parts(config: Config, light: list) -> int:
    """How many processes share the advances: one per core (``[service] workers``), each
    with at least ADVANCE_PART_MIN factors. Advances never go to a Dask cluster: a day's
    update is a second of work, less than shipping it."""
    workers = config.service.workers or os.cpu_count() or 1
    return max(1, min(workers, len(light) // ADVANCE_PART_MIN))


def _split(items: list, parts: int, first: float = 1.0) -> list[list]:
    """``items`` in ``parts`` contiguous runs (none empty), of near-equal length but for
    the first, which holds ``first`` times as many as each of the others."""
    if not items:
        return []
    parts = max(1, min(parts, len(items)))
    weights = np.array([first] + [1.0] * (parts - 1))
    bounds = np.concatenate(([0.0], np.cumsum(weights) / weights.sum() * len(items))).round().astype(int)
    bounds = np.maximum(bounds, np.arange(parts + 1))                  # never an empty part
    bounds = np.minimum(bounds, len(items) - (parts - np.arange(parts + 1)))
    return [items[a:b] for a, b in zip(bounds[:-1], bounds[1:])]


# The share of a day's advances that this process takes, against each forked part's: it
# also inserts its own part's rows while the forked parts run, and they build theirs and
# send them (measured at 500 factors on 2 cores: inserting a part's rows ~0.05 s, sending
# them ~0.03 s, computing a factor ~1.5 ms)
OWN_PART_SHARE = 0.75


def run_refit_item(item):
    """Top-level (picklable) worker task of a refit: a factor's ``(task, thresholds)`` or one
    EM run of the market's fit (:class:`market.MarketRunTask`), with BLAS on one thread
    (``one_blas_thread``)."""
    with one_blas_thread():
        if isinstance(item, market_mod.MarketRunTask):
            return market_mod.run_start_task(item)
        return run_factor_with_warnings(item)


def _write(store, config, inp, plans, outputs, market, started, timings: dict | None = None, *,
           sctx: SetContext | None = None, writes: Writes | None = None) -> int:
    """Store the plans' results and the market's in one transaction.

    ``writes``: the plans' results already prepared (a split advance prepares them in its
    workers); otherwise they are prepared here from ``outputs`` against ``sctx`` (the
    run's set context, taken here when not given).
    """
    t0 = time.perf_counter()
    if writes is None:
        writes = prepare_writes(config, inp, plans, outputs, sctx or set_context(config, inp, plans))
    if timings is not None:
        timings["write_warnings"] = timings.get("write_warnings", 0.0) + time.perf_counter() - t0
    with _RunWriter(store, inp, started, timings) as writer:
        writer.add(plans, writes)
        writer.finish(market)
    return writer.written


class _RunWriter:
    """One transaction that stores a run's results, added a set of plans at a time.

    A day's split advance adds its own part's plans while the forked parts still run, and
    each forked part's as it arrives (:func:`_estimate_and_write`); :meth:`finish` adds
    the market's and the store's version. Committed when the ``with`` block ends without
    an error, rolled back otherwise: nothing of the run is stored unless all of it is.
    """

    def __init__(self, store, inp, started, timings: dict | None) -> None:
        self.store, self.inp, self.started, self.timings = store, inp, started, timings
        self.written = 0
        self._tx = None

    def __enter__(self) -> _RunWriter:
        self._t0 = time.perf_counter()
        self._tx = self.store.transaction()
        self.con = self._tx.__enter__()
        try:
            if read_stamps(self.con) != self.inp.stamps:
                raise ConcurrentUpdate("another process updated the estimates meanwhile")
        except BaseException:
            self._tx.__exit__(*sys.exc_info())
            raise
        return self

    def add(self, plans, writes: Writes) -> None:
        """Store ``plans``' fits (their ids come from the store), supersede what a
        re-derivation replaces, then their estimate rows, filter states, run rows and
        warnings (each re-derivation touches only its own factor's rows, so all of them
        can go before every plan's new rows)."""
        con = self.con
        fit_ids = self._add_fits(plans, writes)
        for plan in plans:
            if plan.kind == "rederive":
                for q in ("supersede_premium", "supersede_regime", "supersede_warnings"):
                    con.execute(sql(f"estimation.{q}"), [plan.factor_id, _d(plan.emit_from)])
        premium = FrameBatch(con, "estimation.insert_premium_frame")
        regimes = FrameBatch(con, "estimation.insert_regime_frame")
        frames = _plan_rows(self.inp, plans, writes, self.started, premium, regimes, fit_ids)
        premium.flush()
        regimes.flush()
        self.written += premium.written
        self.add_frames(frames)

    def _add_fits(self, plans, writes: Writes) -> dict:
        """Store ``plans``' new fits, each replacing the current fit of its factor and
        model: {factor id: {model: fit id}}. Three statements for all of them (ids, the
        fits they replace, the rows), not three a fit: a refit of 10 factors has 40 fits."""
        new = [(plan, rec) for plan in plans for rec in writes.plans[plan.factor_id].fits]
        if not new:
            return {}
        keys = [(plan.factor_id, rec.model) for plan, rec in new]
        if len(set(keys)) != len(keys):
            raise ValueError("two new fits of one model of one factor in one write")
        ids = sorted(r[0] for r in self.con.execute(sql("estimation.next_fit_ids"), [len(new)]).fetchall())
        rows, fit_ids = [], {}
        for fit_id, (plan, rec) in zip(ids, new):
            fid, row = plan.factor_id, self.inp.rows[plan.factor_id]
            rows.append((fit_id, fid, rec.model, rec.status, rec.message, dumps(rec.params),
                         rec.loglik if math.isfinite(rec.loglik) else None, rec.n_obs,
                         bool(rec.converged), _d(row.first), _d(row.last), plan.reason))
            fit_ids.setdefault(fid, {})[rec.model] = fit_id
        frame = _rows_table(rows, FIT_COLUMNS)
        insert_frame(self.con, "estimation.retire_fits_frame", frame)
        insert_frame(self.con, "estimation.insert_fit_frame", frame)
        return fit_ids

    def add_part(self, plans, result: Writes | PartFrames) -> None:
        """A part's results: its :class:`PartFrames`, or its writes for :meth:`add`."""
        if isinstance(result, SpilledFrames):
            try:
                self.add_frames(result.load())
            finally:
                result.remove()
        elif isinstance(result, PartFrames):
            self.add_frames(result)
        else:
            self.add(plans, result)

    def add_frames(self, frames: PartFrames) -> None:
        """Store rows that :func:`part_frames` built (where the part was computed)."""
        con = self.con
        self.written += insert_frame(con, "estimation.insert_premium_frame", frames.premium)
        insert_frame(con, "estimation.insert_regime_frame", frames.regimes)
        for query in ("estimation.update_filter_state_frame", "estimation.insert_new_filter_state_frame"):
            insert_frame(con, query, frames.states)
        insert_frame(con, "estimation.insert_run_frame", frames.runs)
        insert_frame(con, "estimation.insert_warning_frame", frames.warnings)

    def finish(self, market) -> None:
        """The market's results (if any) and the store's new estimates version."""
        if market is not None:
            market_mod.write_market(self.con, market, self.inp, self.started)
        self.con.execute(sql("estimation.bump_version"))
        # what this write leaves: the next chunk of the same run checks against it
        self._stamps = read_stamps(self.con)

    def __exit__(self, *exc) -> None:
        t1 = time.perf_counter()
        self._tx.__exit__(*exc)                 # commit, or roll back on an error
        if exc[0] is not None:
            return
        self.inp.stamps = self._stamps          # committed
        if self.timings is not None:   # commit and close include DuckDB's checkpoint of the store
            # added to: a chunked refit writes several times
            for key, sec in (("write_statements", t1 - self._t0), ("write_commit_close", time.perf_counter() - t1)):
                self.timings[key] = self.timings.get(key, 0.0) + sec


@dataclass
class PartFrames:
    """A set of plans' rows for each table a run writes, as Arrow tables (None: no rows).

    Built where the plans were computed: a forked part of a day's advance sends these
    back instead of its per-factor results (a few columns pickle in a fraction of the
    time of ~20 small arrays a factor: 0.065 s -> ~0.01 s for 280 factors), and its
    parent only inserts them."""

    premium: object
    regimes: object
    states: object
    runs: object
    warnings: object

    def spill(self, folder: str) -> SpilledFrames:
        """These tables as Arrow IPC files in ``folder``, for the parent to map."""
        import pyarrow as pa

        paths = {}
        for f in dataclasses.fields(self):
            table = getattr(self, f.name)
            if table is None:
                paths[f.name] = None
                continue
            path = os.path.join(folder, f"{os.getpid()}-{f.name}.arrow")
            with pa.OSFile(path, "wb") as sink, pa.ipc.new_file(sink, table.schema) as writer:
                writer.write_table(table)
            paths[f.name] = path
        return SpilledFrames(paths)


@dataclass
class SpilledFrames:
    """A forked part's :class:`PartFrames` left as Arrow IPC files in the day's spill
    folder (memory-backed where the system has /dev/shm). Pickled through the pipe, a
    500-factor day's forked part (~3.5 MB, mostly filter states) cost ~0.04 s between
    its last row and the parent's first insert (pickling, the pipe, unpickling: measured
    on the bench store); the parent maps the files instead, without a copy."""

    paths: dict                     # PartFrames field -> file, None: no rows

    def load(self) -> PartFrames:
        import pyarrow as pa

        return PartFrames(**{name: None if path is None else pa.ipc.open_file(pa.memory_map(path)).read_all()
                             for name, path in self.paths.items()})

    def remove(self) -> None:
        for path in self.paths.values():
            if path is not None:
                with suppress(FileNotFoundError):
                    os.unlink(path)


FIT_COLUMNS = ("fit_id", "subject_id", "model", "status", "message", "params_json", "loglik", "n_obs",
               "converged", "data_from", "data_through", "reason")
STATE_COLUMNS = ("subject_id", "model", "fit_id", "through_date", "state_json", "updated_at")
RUN_COLUMNS = ("kind", "reason", "subjects", "from_date", "through_date", "started_at", "status", "message")


def _framed(plan, writes: Writes) -> bool:
    """Whether a plan's rows can be built without the store: no new fit (whose id the
    store gives) and nothing to supersede first."""
    return plan.kind != "rederive" and not writes.plans[plan.factor_id].fits


def part_frames(inp: Inputs, plans, writes: Writes, started) -> PartFrames:
    """:class:`PartFrames` of ``plans`` (each :func:`_framed`): touches no store."""
    if not all(_framed(plan, writes) for plan in plans):
        raise ValueError("a plan with a new fit or a re-derivation needs the store to write it")
    premium = FrameBatch(None, "estimation.insert_premium_frame", limit=10**12)
    regimes = FrameBatch(None, "estimation.insert_regime_frame", limit=10**12)
    frames = _plan_rows(inp, plans, writes, started, premium, regimes, {})
    return dataclasses.replace(frames, premium=premium.table(), regimes=regimes.table())


def _plan_rows(inp: Inputs, plans, writes: Writes, started, premium: FrameBatch, regimes: FrameBatch,
               fit_ids: dict) -> PartFrames:
    """``plans``' estimate rows added to ``premium`` and ``regimes``, and their filter
    states, run rows and warnings as tables (``fit_ids``: this run's new fits' ids per
    factor and model; otherwise the current fits')."""
    state_rows, run_rows = [], []
    for plan in plans:
        fid = plan.factor_id
        pw = writes.plans[fid]
        row = inp.rows[fid]
        new = fit_ids.get(fid, {})
        premium_fit = new.get(MODEL_PREMIUM) or _current_fit_id(inp, fid, MODEL_PREMIUM)
        premium.add({"factor_id": fid, "vintage": plan.vintage, "fit_id": premium_fit}, pw.premium)
        if pw.regimes is not None:
            regime_fit = new.get(MODEL_REGIMES) or _current_fit_id(inp, fid, MODEL_REGIMES)
            regimes.add({"subject_id": fid, "vintage": plan.vintage, "fit_id": regime_fit}, pw.regimes)
        state_rows.append((fid, MODEL_PREMIUM, premium_fit or 0, _d(row.last), pw.state_json, inp.read_at))
        run_rows.append((plan.kind, plan.reason, fid, _d(plan.emit_from) if plan.emit_from is not None else None,
                         _d(row.last), started, "ok", ""))
    return PartFrames(None, None, _rows_table(state_rows, STATE_COLUMNS), _rows_table(run_rows, RUN_COLUMNS),
                      writes.warning_frame())


def _rows_table(rows: list[tuple], columns: tuple[str, ...]):
    """``rows`` as an Arrow table built from their columns (None without rows; pandas
    converted each of a day's 500 filter states, ~12 KB of text, once more: 0.02 s)."""
    import pyarrow as pa

    if not rows:
        return None
    return pa.table({name: pa.array(list(values)) for name, values in zip(columns, zip(*rows))})


def _current_fit_id(inp: Inputs, fid: str, model: str):
    rec = inp.fits.get((fid, model))
    return None if rec is None else int(rec["fit_id"])


def _d(x) -> object:
    """A date for DuckDB (datetime.date) from the run's datetime64 days (or anything pandas reads)."""
    if type(x) is np.datetime64 and not np.isnat(x):
        return x.astype("datetime64[D]").item()
    return pd.Timestamp(x).date()


class ConcurrentUpdate(Exception):
    """The store's estimates changed between reading the inputs and writing the results."""
