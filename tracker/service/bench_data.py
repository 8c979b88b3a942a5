"""Synthetic stores for ``tracker bench``: N factors x T days, seeded, bulk-loaded.

The data are invented and only meant to look like daily factor returns to the models:

* a shared two-regime chain S_t (calm, stressed; P(stay) 0.99 and 0.96, so about 80% of
  days are calm and a stressed spell lasts about 25 days) scales every factor's
  volatility by 0.8 or 1.8, normalised so each factor's unconditional daily volatility
  is its target sigma_i, drawn log-uniform in 0.3%-1.5%;
* annual Sharpe ratios SR_i uniform in 0-0.6, so the daily premium is
  mu_i = SR_i sigma_i / sqrt(252) (252 trading days: common practice), with a slow random
  walk around it (annual Sharpe drift of 0.05 per sqrt(year), the models' stated floor);
* a common shock with loadings rho_i uniform in 0-0.5 gives realistic cross-correlation.

Rows are generated for ``n_days + extra_days`` business days ending on ``end``; the first
``n_days`` are bulk-loaded into the store (``INSERT ... SELECT`` from a registered wide
frame, unpivoted inside DuckDB), the last ``extra_days`` are kept back to be sent as drop
files by the incremental measurements. Nothing here runs a model.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from datetime import date
from pathlib import Path

import numpy as np
import pandas as pd

from tracker.store.connection import Store

PPY = 252                                  # trading days a year: common practice
CALM_STAY, STRESS_STAY = 0.99, 0.96
VOL_SCALE = np.array([0.8, 1.8])           # calm, stressed volatility multipliers
SHARPE_DRIFT = 0.05                        # annual Sharpe-ratio drift per sqrt(year)
ASSET_DAYS = 1000                          # days of returns of each synthetic asset
RISK_FREE_DAILY = 0.0001                   # invented flat daily risk-free rate


@dataclass(frozen=True)
class SyntheticPanel:
    """A seeded panel of factor returns with its truth.

    Attributes
    ----------
    factor_ids : tuple of str, length N
    dates : ndarray, shape (T + H,), datetime64[D]
        Business days; the first T are loaded, the last H are kept back.
    returns : ndarray, shape (T + H, N)
        Decimal daily returns r_{t,i}.
    regimes : ndarray, shape (T + H,), int
        The shared regime chain S_t (0 calm, 1 stressed).
    premium : ndarray, shape (T + H, N)
        True daily premium mu_{t,i}.
    vol : ndarray, shape (N,)
        Target unconditional daily volatility sigma_i.
    sharpe : ndarray, shape (N,)
        Annual Sharpe ratio SR_i at the start.
    n_days : int
        T, the rows loaded into the store.
    """

    factor_ids: tuple[str, ...]
    dates: np.ndarray
    returns: np.ndarray
    regimes: np.ndarray
    premium: np.ndarray
    vol: np.ndarray
    sharpe: np.ndarray
    n_days: int

    @property
    def n_factors(self) -> int:
        return len(self.factor_ids)

    @property
    def extra_days(self) -> int:
        return self.dates.size - self.n_days


def factor_id(i: int) -> str:
    return f"F{i:04d}"


def business_days(end: date, n: int) -> np.ndarray:
    """The ``n`` Monday-Friday dates ending on or before ``end`` (no holiday calendar)."""
    end64 = np.busday_offset(np.datetime64(end, "D"), 0, roll="backward")
    first = np.busday_offset(end64, -(n - 1), roll="backward")
    out = np.arange(first, end64 + 1, dtype="datetime64[D]")
    out = out[np.is_busday(out)]
    return out[-n:]


def regime_chain(rng: np.random.Generator, n: int) -> np.ndarray:
    stay = np.array([CALM_STAY, STRESS_STAY])
    u = rng.random(n)
    s = np.empty(n, dtype=np.int8)
    s[0] = 0
    # a loop over a short state space: 15,000 steps take a few ms
    cur = 0
    for t in range(1, n):
        if u[t] > stay[cur]:
            cur = 1 - cur
        s[t] = cur
    return s


def make_panel(n_factors: int, n_days: int, *, extra_days: int = 0, seed: int = 20261202,
               end: date | None = None) -> SyntheticPanel:
    """Generate the panel (vectorised over factors; about 0.3 s for 500 x 15,000)."""
    if n_factors < 1 or n_days < 2:
        raise ValueError("need at least one factor and two days")
    rng = np.random.default_rng(seed)
    total = n_days + extra_days
    end = end or (pd.Timestamp.today().normalize() - pd.offsets.BDay(1)).date()
    dates = business_days(end, total)
    regimes = regime_chain(rng, total)
    p_calm = (1 - STRESS_STAY) / ((1 - CALM_STAY) + (1 - STRESS_STAY))
    norm = math.sqrt(p_calm * VOL_SCALE[0] ** 2 + (1 - p_calm) * VOL_SCALE[1] ** 2)
    scale = (VOL_SCALE / norm)[regimes]                                   # (T,)
    vol = np.exp(rng.uniform(math.log(0.003), math.log(0.015), n_factors))
    sharpe = rng.uniform(0.0, 0.6, n_factors)
    rho = rng.uniform(0.0, 0.5, n_factors)
    mu0 = sharpe * vol / math.sqrt(PPY)
    step_sd = SHARPE_DRIFT * vol / PPY                 # per-day premium step (see drift_floor_q)
    premium = mu0[None, :] + np.cumsum(rng.standard_normal((total, n_factors)) * step_sd, axis=0)
    common = rng.standard_normal(total)
    shocks = rho[None, :] * common[:, None] + np.sqrt(1 - rho**2)[None, :] * rng.standard_normal((total, n_factors))
    returns = premium + vol[None, :] * scale[:, None] * shocks
    ids = tuple(factor_id(i) for i in range(n_factors))
    return SyntheticPanel(ids, dates, returns, regimes.astype(int), premium, vol, sharpe, n_days)


def load_panel(store: Store, panel: SyntheticPanel) -> int:
    """Bulk-load the first T days and the declarations; returns rows written.

    The wide (T, N) float frame is registered once and unpivoted by DuckDB, so no
    per-row Python objects are made (7.5 million rows load in a few seconds).
    """
    t = panel.n_days
    meta = pd.DataFrame({
        "factor_id": list(panel.factor_ids),
        "label": [f"Synthetic factor {i}" for i in range(panel.n_factors)],
        "description": "invented benchmark data",
        "frequency": "daily",
        "is_traded": True,
        "is_new": False,
        "start_date": pd.NaT,
    })
    wide = pd.DataFrame(panel.returns[:t], columns=list(panel.factor_ids))
    wide.insert(0, "date", panel.dates[:t].astype("datetime64[ns]"))
    with store.transaction() as con:
        con.register("bench_meta", meta)
        con.execute("INSERT INTO factors (factor_id, label, description, frequency, is_traded, is_new, start_date) "
                    "SELECT factor_id, label, description, frequency, is_traded, is_new, CAST(start_date AS DATE) "
                    "FROM bench_meta")
        con.unregister("bench_meta")
        con.register("bench_wide", wide)
        con.execute("INSERT INTO factor_returns (factor_id, date, ret) "
                    "SELECT factor_id, CAST(date AS DATE), ret FROM "
                    "(UNPIVOT bench_wide ON COLUMNS(* EXCLUDE (date)) INTO NAME factor_id VALUE ret)")
        con.unregister("bench_wide")
        con.execute("INSERT OR REPLACE INTO store_meta (key, value) VALUES ('scenario', ?)",
                    [f"synthetic benchmark store, {panel.n_factors} factors x {t} days (invented)"])
    return t * panel.n_factors


@dataclass(frozen=True)
class SyntheticAssets:
    """Invented assets priced by the panel's first factors: r_a = rf + b_a' f + e_a.

    ``returns`` (T + H, K) total returns aligned with the panel's dates, NaN before each
    asset's ASSET_DAYS of history; ``betas`` (K, F) the true exposures on the first F
    factors."""

    asset_ids: tuple
    returns: np.ndarray
    betas: np.ndarray


def make_assets(panel: SyntheticPanel, k: int, *, seed: int = 20261202) -> SyntheticAssets:
    rng = np.random.default_rng(seed + 1)
    f = min(3, panel.n_factors)
    betas = rng.normal(0.8, 0.4, (k, f))
    noise = rng.standard_normal((panel.dates.size, k)) * rng.uniform(0.004, 0.012, k)
    returns = RISK_FREE_DAILY + panel.returns[:, :f] @ betas.T + noise
    returns[: max(panel.n_days - ASSET_DAYS, 0)] = np.nan
    return SyntheticAssets(tuple(f"A{i:05d}" for i in range(k)), returns, betas)


def load_assets(store: Store, panel: SyntheticPanel, assets: SyntheticAssets) -> int:
    """Declare the assets and load their first rows (to the panel's T) and the risk-free
    rate over the same dates; returns asset rows written."""
    t = panel.n_days
    wide = pd.DataFrame(assets.returns[:t], columns=list(assets.asset_ids))
    wide.insert(0, "date", panel.dates[:t].astype("datetime64[ns]"))
    start = max(t - ASSET_DAYS, 0)
    rf = pd.DataFrame({"date": panel.dates[start:t].astype("datetime64[ns]"), "rate": RISK_FREE_DAILY})
    meta = pd.DataFrame({"asset_id": list(assets.asset_ids), "label": "Synthetic asset", "frequency": "daily"})
    with store.transaction() as con:
        con.register("bench_assets", meta)
        con.execute("INSERT INTO assets (asset_id, label, frequency) SELECT asset_id, label, frequency FROM bench_assets")
        con.unregister("bench_assets")
        con.register("bench_wide", wide.iloc[start:])
        con.execute("INSERT INTO asset_returns (asset_id, date, ret) "
                    "SELECT asset_id, CAST(date AS DATE), ret FROM "
                    "(UNPIVOT bench_wide ON COLUMNS(* EXCLUDE (date)) INTO NAME asset_id VALUE ret)")
        con.unregister("bench_wide")
        con.register("bench_rf", rf)
        con.execute("INSERT INTO risk_free (frequency, date, rate) SELECT 'daily', CAST(date AS DATE), rate FROM bench_rf")
        con.unregister("bench_rf")
    return (t - start) * len(assets.asset_ids)


def drop_text(panel: SyntheticPanel, rows: slice, columns: slice | None = None,
              assets: SyntheticAssets | None = None) -> str:
    """A drop file (see :mod:`tracker.ingest.dropformat`) with the panel's rows ``rows``
    (and the assets' rows and the risk-free rate on those dates, when given)."""
    ids = panel.factor_ids if columns is None else panel.factor_ids[columns]
    vals = panel.returns[rows] if columns is None else panel.returns[rows, columns]
    dates = panel.dates[rows]
    lines = [f"-- synthetic benchmark rows, {dates.size} day(s) x {len(ids)} factor(s)",
             "INSERT INTO factor_returns (factor_id, date, ret) VALUES"]
    body = []
    for d, row in zip(dates, vals):
        ds = str(d)
        body.extend(f"  ('{f}', DATE '{ds}', {v:.10g})" for f, v in zip(ids, row))
    text = "\n".join(lines) + "\n" + ",\n".join(body) + ";\n"
    if assets is not None and len(assets.asset_ids):
        a_rows = [f"  ('{a}', DATE '{d}', {v:.10g})" for d, row in zip(dates, assets.returns[rows])
                  for a, v in zip(assets.asset_ids, row) if np.isfinite(v)]
        if a_rows:
            text += "INSERT INTO asset_returns (asset_id, date, ret) VALUES\n" + ",\n".join(a_rows) + ";\n"
        text += ("INSERT INTO risk_free (date, rate) VALUES\n"
                 + ",\n".join(f"  (DATE '{d}', {RISK_FREE_DAILY:.12g})" for d in dates) + ";\n")
    return text


def write_drop(folder: Path, name: str, text: str) -> Path:
    """Write a drop file the way the format asks: under a hidden name, then rename."""
    folder.mkdir(parents=True, exist_ok=True)
    tmp = folder / f".{name}.part"
    tmp.write_text(text, "utf-8")
    target = folder / name
    tmp.rename(target)
    return target
