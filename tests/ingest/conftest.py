"""Fixtures for the drop-file ingestion tests."""

from __future__ import annotations

import pytest
from ingest_helpers import seed_history

from tracker.store.bootstrap import open_store


@pytest.fixture()
def store(tmp_path):
    """(Store, Config): an empty store with three factors, one asset and 80 days of history."""
    st, cfg = open_store(tmp_path / "s" / "store.duckdb", create_demo=False)
    with st.connect() as con:
        seed_history(con)
    return st, cfg


