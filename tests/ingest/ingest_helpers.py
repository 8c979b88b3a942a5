"""Helpers for the drop-file ingestion tests: seeding, drop writers, store checksums."""

from __future__ import annotations

import hashlib
import os
from datetime import date
from pathlib import Path


# A fixed "today" so that the future-date rule does not depend on the day the suite runs.
TODAY = date(2026, 12, 1)
DATA_TABLES = {
    "factors": "factor_id",
    "assets": "asset_id",
    "factor_returns": "factor_id, date",
    "asset_returns": "asset_id, date",
    "risk_free": "frequency, date",
    "revisions": "series_kind, series_id, date, revision_id",
}

SEED_SQL = """
INSERT INTO factors (factor_id, label, description, frequency, is_traded, is_new, start_date) VALUES
  ('MKT', 'Market', 'equity market minus cash', 'daily', TRUE, FALSE, DATE '2020-01-02'),
  ('VAL', 'Value', '', 'daily', TRUE, FALSE, NULL),
  ('MVAL', 'Monthly value', '', 'monthly', TRUE, FALSE, DATE '2020-01-31');
INSERT INTO assets (asset_id, label, description, frequency, start_date) VALUES
  ('EQ', 'Equity sleeve', '', 'daily', DATE '2020-01-02');
"""


def seed_history(con, n_days: int = 80) -> None:
    """Stored history for MKT (sd about 1 %) and VAL, so the reference-sd rule has data."""
    import numpy as np
    import pandas as pd

    con.execute(SEED_SQL)
    days = pd.bdate_range(end="2026-10-30", periods=n_days)
    rng = np.random.default_rng(7)
    frame = pd.DataFrame({
        "factor_id": ["MKT"] * n_days + ["VAL"] * n_days,
        "date": list(days) * 2,
        "ret": np.concatenate([rng.normal(0, 0.01, n_days), rng.normal(0, 0.005, n_days)]),
    })
    con.register("seed_frame", frame)
    con.execute("INSERT INTO factor_returns (factor_id, date, ret) SELECT factor_id, CAST(date AS DATE), ret "
                "FROM seed_frame")
    con.unregister("seed_frame")


def inbox_of(store_config) -> Path:
    st, cfg = store_config
    return cfg.inbox_path(st.folder)


def drop(inbox: Path, name: str, text: str | bytes, *, mtime_ns: int | None = None) -> Path:
    """Write a drop file the documented way: a hidden temporary name, then a rename."""
    data = text.encode("utf-8") if isinstance(text, str) else text
    tmp = inbox / f".{name}.part"
    tmp.write_bytes(data)
    target = inbox / name
    os.replace(tmp, target)
    if mtime_ns is not None:
        os.utime(target, ns=(mtime_ns, mtime_ns))
    return target


def data_checksum(st) -> str:
    """md5 over the ordered rows of every data table and the data_version marker."""
    h = hashlib.md5()
    with st.connect() as con:
        for table, order in DATA_TABLES.items():
            cols = "*" if table != "revisions" else "series_kind, series_id, date, old_value, new_value, drop_id"
            for row in con.execute(f"SELECT {cols} FROM {table} ORDER BY {order}").fetchall():
                h.update(repr(row).encode())
            h.update(b"#")
        h.update(repr(con.execute("SELECT value FROM store_meta WHERE key = 'data_version'").fetchall()).encode())
    return h.hexdigest()


def fetch(st, query: str, params=None):
    with st.connect() as con:
        return con.execute(query, params or []).fetchall()
