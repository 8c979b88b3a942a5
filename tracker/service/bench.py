"""``tracker bench``: how fast the service is on synthetic stores of N factors x T days.

For every (N, T) cell of the grid, in a fresh child process (so its peak memory is its
own), on a seeded synthetic store bulk-loaded by :mod:`tracker.service.bench_data`:

* **full refit** (N <= ``--refit-max``): the first estimation of the store through the
  service, ``update()`` on a store without estimates: every model of every factor
  fitted cold on the whole history, the market regime, every per-date and latest-date
  warning, all writes. Wall time, cost per factor, seconds per model (CPU in workers),
  the market fit's seconds: the run of median wall time of ``--refit-repeats`` (3), each
  from the store as loaded, with every run's wall time. ``--warm-refit`` also times
  ``update(refit=set())``.
* **naive loop** (the same cells, first ``--naive-factors`` factors): cold statsmodels
  fits one factor after another in this process, ``UnobservedComponents`` local level
  (exact diffuse) and ``MarkovRegression`` (2 regimes, switching mean and variance,
  decimal data, defaults); time ratios, and log-likelihoods of ours against theirs.
* **borrowed state** (N > ``--refit-max``, 100 by default): the estimated state is built
  without a real refit (:mod:`tracker.service.bench_state`); then ``--sample-refit``
  factors are refit for real so a refit cost is measured at this very N and T.
  ``--refit-max 500 --naive-factors 10`` runs the real refit at 500 factors (about two
  minutes at 15,000 days on two cores).
* **incremental update** for each of ``--new-days``: a drop file with that many new days
  for every factor goes into the inbox; ingest (``process_inbox``) and ``update()``, both
  timed, with the plan counts. When refits are due as well (on schedule, or after a DRIFT
  warning), the update is split in two, both timed: the factors whose plan is a plain
  advance (``update(only=...)``), then the rest.
* **UI** on the largest cell (``--ui``): see :mod:`tracker.service.bench_ui`.

Before any cell, every compiled kernel is made ready (``jit.prepare_all``): a first run
after an install compiles them once into numba's on-disk cache, a cost no later process
pays; its seconds are reported apart (``kernels_s``).

Once per run, **ingest throughput**: one drop file of ``--ingest-rows`` factor-return
rows through ``process_inbox`` into a store with the factors declared.

JSON (``--json PATH``): ``{"version", "created", "machine", "options", "kernels_s",
"cells": [...], "ingest", "targets": [...]}``; each cell: ``factors, days, state ('refit' | 'borrowed'),
load_s, rows_loaded, full_refit, warm_refit, naive, borrowed_state, sample_refit,
incremental: [...], ui, peak_rss_mb, peak_children_rss_mb, build_peak_rss_mb,
build_peak_children_rss_mb, seconds``. A cell runs in two processes: the build (load,
then a real refit or the borrowed state) and the use (the incremental days, the sample
refit, the UI), so the daily figures and ``peak_rss_mb`` are those of a process that,
like the product's, did not build the store; ``build_peak_*`` is the build's (a product
refit for 'refit' cells, the bench's own builder for 'borrowed' ones). Fields of the
sub-objects are in :mod:`tracker.service.bench_cell`. Nothing is extrapolated silently: a
number not measured in this run is null, and a projection says so in its field name.

Scale-out: refits go through :func:`tracker.service.executor.executor_for`, i.e. the
``[service] workers`` local processes, or the Dask cluster at ``[service] dask_scheduler``.
"""

from __future__ import annotations

import json
import math
import multiprocessing
import os
import platform
import resource
import shutil
import tempfile
import time
import warnings
from datetime import datetime
from pathlib import Path

import numpy as np

from tracker.service.bench_data import ASSET_DAYS
from tracker.service.bench_report import print_report, targets

DEFAULT_FACTORS = (10, 100, 500)
DEFAULT_DAYS = (6500, 15000)


def add_bench_arguments(parser) -> None:
    """Options of ``tracker bench`` (the lead wires the subcommand to :func:`bench_command`)."""
    parser.add_argument("--factors", default=",".join(map(str, DEFAULT_FACTORS)), metavar="N[,N...]",
                        help="numbers of factors (default 10,100,500)")
    parser.add_argument("--days", default=",".join(map(str, DEFAULT_DAYS)), metavar="T[,T...]",
                        help="days of history (default 6500,15000)")
    parser.add_argument("--cells", default=None, metavar="NxT[,NxT...]",
                        help="explicit cells instead of the grid, e.g. 10x6500,500x2000")
    parser.add_argument("--refit-max", type=int, default=100, metavar="N",
                        help="cells with more factors skip the full refit and the naive loop and build "
                             "their state from borrowed parameters (default 100)")
    parser.add_argument("--naive-factors", type=int, default=0, metavar="K",
                        help="factors in the naive statsmodels loop (default 0: all of the cell)")
    parser.add_argument("--refit-repeats", type=int, default=3, metavar="K",
                        help="cold refits of each refit cell, each from the store as loaded; the "
                             "median is reported (default 3; 1 for a quicker run)")
    parser.add_argument("--warm-refit", action="store_true", help="also time a warm refit of all factors")
    parser.add_argument("--sample-refit", type=int, default=4, metavar="K",
                        help="factors refit for real in a borrowed-state cell (default 4; 0 skips)")
    parser.add_argument("--new-days", default="1,5", metavar="K[,K...]",
                        help="sizes of the incremental drop files in days (default 1,5)")
    parser.add_argument("--ingest-rows", type=int, default=1_000_000, metavar="ROWS",
                        help="rows of the ingest-throughput drop file (default 1,000,000; 0 skips)")
    parser.add_argument("--assets", type=int, default=0, metavar="K",
                        help="synthetic assets per cell, with the last %d days of returns; their "
                             "exposures are derived before the daily drops, which then carry asset "
                             "rows too (default 0: none)" % ASSET_DAYS)
    parser.add_argument("--ui", dest="ui", action="store_true", default=True,
                        help="time the interface on the largest cell (default)")
    parser.add_argument("--no-ui", dest="ui", action="store_false")
    parser.add_argument("--workers", type=int, default=None, help="worker processes (default [service] workers)")
    parser.add_argument("--json", metavar="PATH", default=None, help="also write the results as JSON")
    parser.add_argument("--workdir", metavar="DIR", default=None, help="where the stores go (default a temp folder)")
    parser.add_argument("--keep", action="store_true", help="keep the stores afterwards")
    parser.add_argument("--seed", type=int, default=20261202)
    parser.add_argument("--in-process", action="store_true",
                        help="run the cells in this process (faster start; peak memory then covers the whole run)")


def _ints(text) -> list[int]:
    if isinstance(text, (list, tuple)):
        return [int(v) for v in text]
    return [int(v) for v in str(text).replace(" ", "").split(",") if v]


def _cells(text) -> list[tuple[int, int]] | None:
    if not text:
        return None
    out = []
    for part in str(text).replace(" ", "").split(","):
        n, _, t = part.lower().partition("x")
        out.append((int(n), int(t)))
    return out


def _options(args) -> dict:
    get = (lambda k, d=None: args.get(k, d)) if isinstance(args, dict) else (lambda k, d=None: getattr(args, k, d))
    opts = {
        "factors": _ints(get("factors", DEFAULT_FACTORS)), "days": _ints(get("days", DEFAULT_DAYS)),
        "refit_max": int(get("refit_max", 100)), "naive_factors": int(get("naive_factors", 0) or 0),
        "warm_refit": bool(get("warm_refit", False)), "sample_refit": int(get("sample_refit", 4)),
        "refit_repeats": int(get("refit_repeats", 3)),
        "new_days": _ints(get("new_days", "1,5")), "ingest_rows": int(get("ingest_rows", 1_000_000)),
        "ui": bool(get("ui", True)), "workers": get("workers"), "json": get("json"),
        "workdir": get("workdir"), "keep": bool(get("keep", False)), "seed": int(get("seed", 20261202)),
        "in_process": bool(get("in_process", False)), "cells": _cells(get("cells")),
        "assets": int(get("assets", 0) or 0),
    }
    grid = opts["cells"] or [(n, t) for n in opts["factors"] for t in opts["days"]]
    if not grid or min(n for n, _ in grid) < 1 or min(t for _, t in grid) < 300:
        raise ValueError("need at least one cell with >= 1 factor and >= 300 days")
    if opts["assets"] < 0:
        raise ValueError("--assets must not be negative")
    if opts["refit_repeats"] < 1:
        raise ValueError("--refit-repeats must be at least 1")
    if not opts["new_days"] or min(opts["new_days"]) < 1:
        raise ValueError("--new-days must list positive day counts")
    return opts


def bench_command(args, echo=print) -> int:
    """Run the benchmark; ``args`` is the argparse namespace or a dict of the options."""
    try:
        opts = _options(args)
    except ValueError as exc:
        echo(f"tracker bench: {exc}")
        return 2
    own_dir = opts["workdir"] is None
    root = Path(opts["workdir"] or tempfile.mkdtemp(prefix="tracker-bench-"))
    root.mkdir(parents=True, exist_ok=True)
    started = time.perf_counter()
    cells_spec = opts["cells"] or [(n, t) for t in sorted(opts["days"]) for n in sorted(opts["factors"])]
    largest = max(cells_spec, key=lambda c: (c[0], c[1]))
    result = {"version": 1, "created": datetime.now().isoformat(timespec="seconds"),
              "machine": {"cpus": os.cpu_count(), "python": platform.python_version(),
                          "platform": platform.platform()},
              "options": {k: v for k, v in opts.items() if k not in ("json",)}, "cells": [], "ingest": None}
    from tracker.estimation import jit

    warm = jit.prepare_all()
    echo(f"compiled kernels ready in {sum(warm.values()):.1f} s (numba's on-disk cache; the first "
         "run after an install compiles them, and that is not timed)")
    result["kernels_s"] = warm
    try:
        for n, t in cells_spec:
            echo(f"cell {n} factors x {t} days ...")
            spec = {**opts, "n": n, "t": t, "ui_here": opts["ui"] and (n, t) == largest,
                    "folder": str(root / f"cell-{n}x{t}")}
            cell = _isolated(_build_cell, spec, opts["in_process"])
            if "error" not in cell:
                # the daily path in a fresh process, as the product runs it (the build's
                # memory and heap are the bench's, not the product's)
                used = _isolated(_use_cell, {**spec, "state": cell["state"]}, opts["in_process"])
                if "error" in used:
                    cell["error"] = used["error"]
                cell["build_peak_rss_mb"] = cell.pop("peak_rss_mb")
                cell["build_peak_children_rss_mb"] = cell.pop("peak_children_rss_mb", None)
                cell["seconds"] += used.pop("seconds", 0.0)
                cell.update(used)
            result["cells"].append(cell)
            echo(f"  done in {cell.get('seconds', float('nan')):.1f} s")
        if opts["ingest_rows"] > 0:
            echo(f"ingest of {opts['ingest_rows']:,} rows ...")
            result["ingest"] = _isolated(_run_ingest, {**opts, "folder": str(root / "ingest")}, opts["in_process"])
    finally:
        if own_dir and not opts["keep"]:
            shutil.rmtree(root, ignore_errors=True)
    result["seconds"] = time.perf_counter() - started
    result["targets"] = targets(result)
    print_report(result, echo)
    if opts["json"]:
        Path(opts["json"]).write_text(json.dumps(_clean(result), indent=2) + "\n", "utf-8")
        echo(f"JSON written to {opts['json']}")
    return 0 if all("error" not in c for c in result["cells"]) else 1


def _clean(x):
    if isinstance(x, dict):
        return {str(k): _clean(v) for k, v in x.items()}
    if isinstance(x, (list, tuple)):
        return [_clean(v) for v in x]
    if isinstance(x, (np.floating, float)):
        return float(x) if math.isfinite(float(x)) else None
    if isinstance(x, np.integer):
        return int(x)
    if isinstance(x, np.bool_):
        return bool(x)
    return x


# ---------------------------------------------------------------------- isolation


def _entry(fn, spec, queue) -> None:
    try:
        queue.put(fn(spec))
    except BaseException as exc:  # reported in the cell, the run goes on
        queue.put({"error": f"{type(exc).__name__}: {exc}", "factors": spec.get("n"), "days": spec.get("t")})


def _isolated(fn, spec: dict, in_process: bool) -> dict:
    if in_process:
        try:
            return fn(spec)
        except Exception as exc:
            return {"error": f"{type(exc).__name__}: {exc}", "factors": spec.get("n"), "days": spec.get("t")}
    ctx = multiprocessing.get_context("spawn")
    queue = ctx.Queue()
    proc = ctx.Process(target=_entry, args=(fn, spec, queue))
    proc.start()
    out = queue.get()
    proc.join()
    return out


def _peak(out: dict) -> dict:
    out["peak_rss_mb"] = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    out["peak_children_rss_mb"] = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024
    return out


# ---------------------------------------------------------------------- one cell


def _build_cell(spec: dict) -> dict:
    from tracker.service.bench_cell import build_cell

    return _timed_phase(build_cell, spec)


def _use_cell(spec: dict) -> dict:
    from tracker.service.bench_cell import use_cell

    return _timed_phase(use_cell, spec)


def _timed_phase(fn, spec: dict) -> dict:
    t0 = time.perf_counter()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        out = fn(spec)
    out["seconds"] = time.perf_counter() - t0
    return _peak(out)


def _run_ingest(spec: dict) -> dict:
    from tracker.service.bench_cell import run_ingest

    t0 = time.perf_counter()
    out = run_ingest(spec)
    out["seconds_total"] = time.perf_counter() - t0
    return _peak(out)
