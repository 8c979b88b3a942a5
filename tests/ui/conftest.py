"""A small deterministic store for the UI tests, built and estimated once per session.

Three invented daily factors over 400 business days (seeded generator), estimated once,
reviewed, then one more day arrives by drop file (with one large move, so the inbox has
a warning) and one drop file is rejected (an undeclared factor). Every timestamp the
screens show is then set to a fixed value, so snapshots do not depend on the clock.
Ten more days are kept back for the live-update tests (see ui_helpers.py).
"""

from __future__ import annotations

import dataclasses
import shutil
from pathlib import Path

import pandas as pd
import pytest
from ui_helpers import DATES, FACTORS, N_STORED, RETURNS, day, drop_text, freeze_timestamps, insert_day, write_drop

from tracker.store.bootstrap import open_store
from tracker.store.sqlfiles import sql


@pytest.fixture(scope="session")
def small_store_template(tmp_path_factory) -> Path:
    from tracker.service.estimate import update
    from tracker.service.views import mark_reviewed

    folder = tmp_path_factory.mktemp("ui-small")
    store, config = open_store(folder / "store.duckdb", create_demo=False)
    history = pd.concat([pd.DataFrame({"factor_id": k, "date": DATES[:N_STORED].date, "ret": v[:N_STORED]})
                         for k, v in RETURNS.items()])
    with store.transaction() as con:
        for name, frame in (("factors", FACTORS), ("factor_returns", history)):
            con.register("incoming_frame", frame)
            con.execute(sql(f"seed.{name}"))
            con.unregister("incoming_frame")
    update(store, config)
    mark_reviewed(store, config, reviewer="test")
    inbox = config.inbox_path(store.folder)
    try:
        from tracker.ingest.inbox import process_inbox
    except ImportError:
        insert_day(store, N_STORED)
    else:
        write_drop(inbox, "day-401.sql", drop_text(N_STORED, big_move=True))
        process_inbox(store, config)
        write_drop(inbox, "undeclared.sql",
                   f"INSERT INTO factor_returns VALUES ('NOPE', DATE '{day(N_STORED).isoformat()}', 0.01);\n")
        process_inbox(store, config)
    update(store, config)
    freeze_timestamps(store)
    return store.path


@pytest.fixture()
def small_store(small_store_template, tmp_path):
    """A private copy of the small store: (Store, Config) with live passes only on request."""
    target = tmp_path / "small"
    shutil.copytree(small_store_template.parent, target)
    store, config = open_store(target / "store.duckdb")
    config = dataclasses.replace(config, ui=dataclasses.replace(config.ui, refresh_s=3600.0))
    return store, config


