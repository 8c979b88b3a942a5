"""The rows of the board: one per factor, everything the UI shows, no Textual here."""

from __future__ import annotations

from dataclasses import dataclass
from datetime import date

import pandas as pd

from tracker.service.status import factor_summary
from tracker.store.connection import Store


@dataclass(frozen=True)
class BoardRow:
    factor_id: str
    label: str
    frequency: str
    is_new: bool
    n_obs: int
    last_date: date | None
    mean_ann: float
    vol_ann: float
    sharpe_ann: float


def board_rows(store: Store) -> list[BoardRow]:
    df = factor_summary(store)
    rows = []
    for r in df.itertuples():
        rows.append(
            BoardRow(
                factor_id=r.factor_id,
                label=r.label,
                frequency=r.frequency,
                is_new=bool(r.is_new),
                n_obs=int(r.n_obs),
                last_date=None if pd.isna(r.last_date) else pd.Timestamp(r.last_date).date(),
                mean_ann=float(r.mean_ann),
                vol_ann=float(r.vol_ann),
                sharpe_ann=float(r.sharpe_ann),
            )
        )
    return rows
