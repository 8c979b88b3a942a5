"""Creating, migrating and seeding a store on first use."""

from __future__ import annotations

import os
from pathlib import Path

import duckdb
import pandas as pd

from tracker.config import CONFIG_NAME, Config, default_config_text, load_config
from tracker.store.connection import Store, check_writable_folder, migrate
from tracker.store.errors import StoreError
from tracker.store.sqlfiles import sql

DEMO_META_KEY = "scenario"


def open_store(path: Path, *, create_demo: bool = True) -> tuple[Store, Config]:
    """Open the store at ``path``, creating and migrating it on first use.

    A new store gets a default ``tracker.toml`` beside it and, unless ``create_demo`` is
    false, the invented demo scenario's history. Nothing is written when the
    configuration beside an existing store is invalid.
    """
    path = Path(path)
    folder = path.parent
    if path.exists() and path.is_dir():
        raise StoreError(f"store path {path} is a folder, not a file")
    is_new = not path.exists()
    if is_new:
        check_writable_folder(folder)
    config = load_config(folder)  # validate before writing anything
    store = Store(path, busy_timeout=config.store.busy_timeout_s, memory_limit_mb=config.store.memory_limit_mb)
    if is_new:
        _create(store, create_demo=create_demo)
    else:
        with store.connect() as con:
            migrate(con)
    config.inbox_path(folder).mkdir(parents=True, exist_ok=True)
    return store, config


def _create(store: Store, *, create_demo: bool) -> None:
    tmp = store.path.with_name(store.path.name + f".creating-{os.getpid()}")
    for leftover in (tmp, Path(str(tmp) + ".wal")):
        leftover.unlink(missing_ok=True)
    # Build under a temporary name and rename, so a crash never leaves a half-seeded store.
    try:
        con = duckdb.connect(str(tmp))
    except duckdb.Error as exc:
        raise StoreError(f"cannot create store {store.path}: {exc}") from exc
    try:
        migrate(con)
        if create_demo:
            load_demo(con)
        con.execute("CHECKPOINT")
    finally:
        con.close()
    os.replace(tmp, store.path)
    cfg = store.folder / CONFIG_NAME
    if not cfg.exists():
        cfg.write_text(default_config_text(), "utf-8")


def load_demo(con: duckdb.DuckDBPyConnection) -> None:
    """Load the invented scenario's history (all but the held-back days) and its truth."""
    from tracker.seed_db.scenario import INSTITUTION, SEED, generate

    scn = generate()
    cut = scn.cutoff

    def upto(df: pd.DataFrame) -> pd.DataFrame:
        return df[df["date"] <= cut]

    con.execute("BEGIN TRANSACTION")
    frames = {
        "factors": scn.factors,
        "assets": scn.assets,
        "factor_returns": upto(scn.factor_returns),
        "asset_returns": upto(scn.asset_returns),
        "risk_free": upto(scn.risk_free),
        "truth_premia": scn.truth_premia,
        "truth_regimes": scn.truth_regimes,
        "truth_exposures": scn.truth_exposures,
    }
    for table, frame in frames.items():
        con.register("incoming_frame", frame)
        con.execute(sql(f"seed.{table}"))
        con.unregister("incoming_frame")
    con.execute(sql("status.set_meta"), [DEMO_META_KEY, f"{INSTITUTION} (invented), seed {SEED}"])
    con.execute("COMMIT")
