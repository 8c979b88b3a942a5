"""The `tracker` command line: global options, subcommands, exit codes.

Exit codes: 0 success; 1 the work ran but something failed (a drop file was rejected,
an export failed); 2 usage or configuration error (nothing was written).
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from tracker import __version__
from tracker.config import ConfigError
from tracker.paths import default_demo_store_path, resolve_store_path
from tracker.store.errors import StoreError

CAUTION = (
    "Statistical estimates, not investment advice. Follow your firm's model-risk and "
    "investment policies and licensed advice."
)


class UsageError(Exception):
    pass


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="tracker",
        description="Regime-aware tracking of factor risk premia. " + CAUTION,
    )
    parser.add_argument("--version", action="version", version=f"tracker {__version__}")
    parser.add_argument(
        "--store",
        metavar="PATH",
        help="the store file (default: $TRACKER_STORE, else the per-user data folder); "
        "a missing store is created with the invented demo scenario",
    )
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")

    p = sub.add_parser("ui", help="open the terminal interface (the default command)")
    p.set_defaults(handler=_cmd_ui)

    p = sub.add_parser("demo", help="open the interface on the demo store and replay held-back days into its inbox")
    p.add_argument("--pace", type=float, default=15.0, metavar="SECONDS",
                   help="seconds between replayed drop files (default 15; 0 drops none)")
    p.add_argument("--no-ui", action="store_true", help="replay only, without the interface")
    p.set_defaults(handler=_cmd_demo)

    p = sub.add_parser("init", help="create a store (with the demo scenario unless --empty)")
    p.add_argument("--empty", action="store_true", help="create an empty store for your own data")
    p.set_defaults(handler=_cmd_init)

    p = sub.add_parser("status", help="store path, factor and row counts, date range, last fit, pending drops")
    p.set_defaults(handler=_cmd_status)

    p = sub.add_parser("refit", help="re-estimate model parameters (all factors, or the ones named)")
    p.add_argument("factors", nargs="*", metavar="FACTOR", help="factor ids (default: all)")
    p.add_argument("--workers", type=int, default=None,
                   help="local worker processes (default: [service] workers, or the Dask cluster when configured)")
    p.add_argument("--cold", action="store_true",
                   help="start every fit afresh (multi-start) instead of from the parameters in force; "
                        "the market model re-selects its number of states")
    p.set_defaults(handler=_cmd_refit)

    p = sub.add_parser("update", help="bring estimates up to date with the stored data (no refit unless due)")
    p.set_defaults(handler=_cmd_update)

    p = sub.add_parser("ingest", help="apply the inbox's drop files (or the named files) once, then update estimates")
    p.add_argument("paths", nargs="*", metavar="PATH", help="drop files or folders (default: the inbox)")
    p.add_argument("--no-estimate", action="store_true", help="apply the data only; estimates catch up later")
    p.set_defaults(handler=_cmd_ingest)

    p = sub.add_parser("watch", help="process the inbox continuously, headless, updating estimates after each file")
    p.set_defaults(handler=_cmd_watch)

    p = sub.add_parser("report", help="print the board, market regime, warnings and asset view (for cron and e-mail)")
    p.add_argument("--format", choices=("text", "markdown", "csv", "json"), default="text")
    p.add_argument("--since-review", action="store_true", help="only what changed since the last review")
    p.set_defaults(handler=_cmd_report)

    p = sub.add_parser("bench", help="benchmark synthetic stores: refit, incremental update, naive loop, ingest, UI, memory")
    from tracker.service.bench import add_bench_arguments

    add_bench_arguments(p)
    p.set_defaults(handler=_cmd_bench)

    p = sub.add_parser("export", help="write stored tables as CSV or Parquet files")
    p.add_argument("tables", nargs="*", metavar="TABLE", help="tables to export (default: all readable tables)")
    p.add_argument("--format", choices=("csv", "parquet"), default="csv")
    p.add_argument("--out", metavar="DIR", default="tracker-export", help="output folder (default ./tracker-export)")
    p.set_defaults(handler=_cmd_export)
    return parser


def _open(args, *, create_demo: bool = True):
    from tracker.store.bootstrap import open_store

    return open_store(resolve_store_path(args.store), create_demo=create_demo)


def _cmd_ui(args) -> int:
    store, config = _open(args)
    from tracker.ui.app import run_app

    run_app(store, config)
    return 0


def _cmd_demo(args) -> int:
    if args.pace < 0:
        raise UsageError("--pace must be zero or positive")
    if args.store is None and not _env_store():
        args.store = str(default_demo_store_path())
    store, config = _open(args)
    from tracker.service.demo import DemoReplay

    replay = DemoReplay(store, config, pace=args.pace)
    if args.no_ui:
        replay.run_blocking(echo=print)
        return 0
    replay.start()
    try:
        from tracker.ui.app import run_app

        run_app(store, config)
    finally:
        replay.stop()
    return 0


def _env_store() -> bool:
    import os

    return bool(os.environ.get("TRACKER_STORE"))


def _cmd_init(args) -> int:
    path = resolve_store_path(args.store)
    if path.exists():
        raise UsageError(f"a store already exists at {path}")
    store, config = _open(args, create_demo=not args.empty)
    print(f"created {'an empty' if args.empty else 'a demo'} store at {store.path}")
    print(f"inbox: {config.inbox_path(store.folder)}")
    return 0


def _cmd_status(args) -> int:
    store, config = _open(args)
    from tracker.service.status import factor_summary, store_status

    st = store_status(store, config.inbox_path(store.folder))
    print(f"store:        {st.path}")
    if st.scenario:
        print(f"scenario:     {st.scenario} -- every name and number in it is invented")
    print(f"inbox:        {st.inbox} ({st.pending_drops} pending)")
    print(f"factors:      {st.counts['factors']}    assets: {st.counts['assets']}")
    print(f"date range:   {st.first_date or '-'} .. {st.last_date or '-'}")
    print(f"last fit:     {st.last_fit or 'never'}")
    print(f"last update:  {st.last_run or 'never'}")
    drops = ", ".join(f"{k} {v}" for k, v in sorted(st.drops.items())) or "none"
    print(f"drop files:   {drops}")
    print("rows:")
    for table, n in st.counts.items():
        print(f"  {table:<18} {n:>10,}")
    summary = factor_summary(store)
    if len(summary):
        print("factors (descriptive, whole history; annualised by 252 or 12):")
        print(f"  {'id':<8} {'obs':>6} {'last date':>10} {'mean':>7} {'vol':>7} {'Sharpe':>7}")
        for r in summary.itertuples():
            last = r.last_date.strftime("%Y-%m-%d") if r.n_obs else "-"
            print(f"  {r.factor_id:<8} {r.n_obs:>6} {last:>10} {_pct(r.mean_ann)} {_pct(r.vol_ann)} {r.sharpe_ann:>7.2f}")
    print(CAUTION)
    return 0


def _pct(x: float) -> str:
    return f"{x * 100:>6.2f}%" if x == x else f"{'-':>7}"


def _progress_printer():
    import time

    start = time.monotonic()

    def show(done: int, total: int, label: str) -> None:
        width = 30
        filled = int(width * done / max(total, 1))
        bar = "#" * filled + "." * (width - filled)
        end = "\n" if done >= total else ""
        print(f"\r[{bar}] {done}/{total} {label:<24} {time.monotonic() - start:6.1f}s", end=end, flush=True,
              file=sys.stderr)

    return show


def _cmd_refit(args) -> int:
    store, config = _open(args)
    from tracker.service.estimate import update
    from tracker.service.executor import LocalProcessExecutor, executor_for

    known = _factor_ids(store)
    unknown = [f for f in args.factors if f not in known]
    if unknown:
        raise UsageError(f"unknown factor {unknown[0]!r}; known: {', '.join(sorted(known))}")
    if args.workers is not None and args.workers < 1:
        raise UsageError("--workers must be at least 1")
    summary = update(store, config, refit=set(args.factors), progress=_progress_printer(),
                     executor=LocalProcessExecutor(args.workers) if args.workers else executor_for(config),
                     cold=bool(getattr(args, "cold", False)))
    print(summary.describe())
    return 0 if not summary.skipped else 1


def _cmd_update(args) -> int:
    store, config = _open(args)
    from tracker.service.estimate import update

    summary = update(store, config, progress=_progress_printer())
    print(summary.describe())
    return 0 if not summary.skipped else 1


def _cmd_ingest(args) -> int:
    store, config = _open(args)
    from tracker.ingest.commands import ingest_command

    paths = [Path(p) for p in args.paths] if args.paths else None
    code = ingest_command(store, config, paths, print)
    if not args.no_estimate:
        from tracker.service.estimate import update

        print(update(store, config).describe())
    return code


def _cmd_watch(args) -> int:
    import signal
    import threading

    store, config = _open(args)
    from tracker.ingest.commands import watch_command
    from tracker.service.estimate import update

    stop = threading.Event()
    for sig in (signal.SIGTERM, signal.SIGHUP, signal.SIGINT):
        signal.signal(sig, lambda *_: stop.set())

    def estimate(_outcome=None) -> None:
        try:
            print(update(store, config).describe(), flush=True)
        except Exception as exc:  # the next applied file or restart catches up
            print(f"estimation failed, will catch up later: {type(exc).__name__}: {exc}", flush=True)

    estimate()  # catch up with anything applied while nobody was watching
    return watch_command(store, config, lambda m: print(m, flush=True), stop, on_applied=estimate)


def _cmd_report(args) -> int:
    store, config = _open(args)
    from tracker.service.report import render_report

    sys.stdout.write(render_report(store, config, args.format, since_review=args.since_review))
    return 0


def _cmd_bench(args) -> int:
    from tracker.service.bench import bench_command

    return bench_command(args, echo=print)


def _factor_ids(store) -> set[str]:
    from tracker.service.status import factor_summary

    return set(factor_summary(store)["factor_id"])


def _cmd_export(args) -> int:
    store, _ = _open(args)
    from tracker.service.export import ExportError, export_tables

    try:
        written = export_tables(store, list(args.tables), Path(args.out), args.format)
    except ExportError as exc:
        raise UsageError(str(exc)) from None
    for path in written:
        print(path)
    return 0


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if getattr(args, "handler", None) is None:
        args.handler = _cmd_ui
    try:
        return int(args.handler(args) or 0)
    except (ConfigError, StoreError, UsageError) as exc:
        print(f"tracker: error: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        return 130
    except BrokenPipeError:  # e.g. `tracker status | head`: the reader left, nothing is wrong
        import os

        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return 0


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
