"""Read-only summaries of a store: `tracker status` and the first board."""

from __future__ import annotations

from dataclasses import dataclass
from datetime import date, datetime

import numpy as np
import pandas as pd

from tracker.store.connection import Store
from tracker.store.sqlfiles import sql

PERIODS_PER_YEAR = {"daily": 252, "monthly": 12}  # common practice


@dataclass(frozen=True)
class StoreStatus:
    path: str
    inbox: str
    counts: dict[str, int]
    first_date: date | None
    last_date: date | None
    last_fit: datetime | None
    last_run: datetime | None
    drops: dict[str, int]
    pending_drops: int
    scenario: str | None


def pending_drop_files(inbox) -> list:
    """Drop files waiting in the inbox (``*.sql``; temporary and hidden names are ignored)."""
    if not inbox.exists():
        return []
    return sorted(p for p in inbox.iterdir() if p.is_file() and p.suffix == ".sql" and not p.name.startswith("."))


def store_status(store: Store, inbox) -> StoreStatus:
    with store.connect() as con:
        counts = dict(con.execute(sql("status.table_counts")).fetchall())
        first, last = con.execute(sql("status.date_range")).fetchone()
        last_fit = con.execute(sql("status.last_fit")).fetchone()[0]
        last_run = con.execute(sql("status.last_run")).fetchone()[0]
        drops = dict(con.execute(sql("status.drop_outcomes")).fetchall())
        row = con.execute(sql("status.get_meta"), ["scenario"]).fetchone()
    return StoreStatus(
        path=str(store.path),
        inbox=str(inbox),
        counts={k: int(v) for k, v in counts.items()},
        first_date=first,
        last_date=last,
        last_fit=last_fit,
        last_run=last_run,
        drops={k: int(v) for k, v in drops.items()},
        pending_drops=len(pending_drop_files(inbox)),
        scenario=row[0] if row else None,
    )


def factor_summary(store: Store) -> pd.DataFrame:
    """Descriptive statistics per factor, annualised by 252 or 12 (common practice).

    Columns: factor_id, label, frequency, is_traded, is_new, n_obs, first_date,
    last_date, mean_ann, vol_ann, sharpe_ann.
    """
    with store.connect() as con:
        df = con.execute(sql("status.factor_summary")).df()
    ppy = df["frequency"].map(PERIODS_PER_YEAR).astype(float)
    df["mean_ann"] = df["mean_ret"] * ppy
    df["vol_ann"] = df["sd_ret"] * np.sqrt(ppy)
    df["sharpe_ann"] = df["mean_ann"] / df["vol_ann"]
    return df.drop(columns=["mean_ret", "sd_ret"])
