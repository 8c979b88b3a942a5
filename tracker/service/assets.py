"""From factor premia to expected asset excess returns, pricing errors and the SDF.

Stored (real-time vintages, table ``exposure_estimates``): rolling-window OLS exposures of
each asset's excess return (total return minus the risk-free rate) on the factors, with
Newey-West standard errors, using data up to each date only. Computed on demand for the
assets view and the report, from the stored data and the latest filtered premia:

* expected excess return = beta' lambda, annualised, with a delta-method standard error
  that includes both premium and exposure uncertainty (premia treated as independent:
  the store keeps each factor's filtered variance, not their covariance);
* the asset's own realised mean excess return, the gap (pricing error) and its HAC t-stat;
* the GRS test of joint alphas (Gibbons, Ross & Shanken 1989);
* Fama-MacBeth (1973) cross-sectional premia beside the time-series (filtered) premia, and
  the complete-market inversion lambda = B^-1 (mu - r) when it is identified;
* the implied linear SDF m = 1 - b'(f - E f), b = Sigma^-1 mu, from the filtered premia and
  the recent factor covariance: its volatility is the maximal Sharpe ratio of the factor
  span (Hansen & Jagannathan 1991); pricing errors per asset.

Which factors enter: the daily long-history traded factors, since a row with any missing
factor cannot be used (a short-history factor would shrink every window to its own
history), and among them, when there are more, the market regime's choice
(:func:`exposure_factors`): a few hundred regressors would leave a window of 756 rows
with no degrees of freedom and every asset-date a large solve.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass
from datetime import date

import numpy as np
import pandas as pd

from tracker.config import Config
from tracker.estimation.exposures import RollingExposureModel
from tracker.estimation.pricing import (
    CompleteMarketInversion,
    ExpectedReturnModel,
    FamaMacBeth,
    GRSTest,
    LinearSDF,
    implied_excess_returns,
)
from tracker.service.factor_models import PERIODS_PER_YEAR
from tracker.store.connection import Store
from tracker.store.sqlfiles import sql

ALPHA = "*alpha*"


@dataclass(frozen=True)
class Panel:
    dates: pd.DatetimeIndex
    excess: pd.DataFrame          # (T, N) asset excess returns, decimal per period
    factors: pd.DataFrame         # (T, K) factor returns
    frequency: str


def exposure_factors(con, config: Config | None = None, frequency: str = "daily", *,
                     row_counts: dict | None = None) -> list[str]:
    """The factors the asset layer regresses on (see the module docstring).

    The traded factors of ``frequency`` with at least 90% of the longest such history;
    when there are more than the market regime may take (``[models] market_factors_max``,
    or an explicit ``market_factors`` list), the market regime's own choice among them --
    its current fit's columns while they are still eligible, else the most volatile
    (:func:`tracker.service.market.choose_columns`). A window of a few hundred rows
    cannot carry hundreds of regressors, and each extra factor costs every asset-date
    a larger solve, so the set stays as small as the market's. ``row_counts`` (factor id
    -> stored rows, as an estimation run's inputs count them) spares the count over the
    whole return table.
    """
    from tracker.service.market import MARKET, MODEL_MARKET, choose_columns

    if row_counts is None:
        counts = dict(con.execute(sql("assets.factor_row_counts"), [frequency]).fetchall())
    else:
        counts = {f: int(row_counts.get(f, 0)) for (f,) in con.execute(sql("assets.traded_factors"),
                                                                       [frequency]).fetchall()}
    longest = max(counts.values(), default=0)
    if longest == 0:
        return []
    eligible = sorted(f for f, n in counts.items() if n >= 0.9 * longest)
    if config is None:
        return eligible
    row = con.execute(sql("assets.market_fit_columns"), [MARKET, MODEL_MARKET]).fetchone()
    previous = tuple(json.loads(row[0])) if row and row[0] else None

    def variances() -> dict:
        rows = con.execute(sql("estimation.factor_variances"), [eligible]).fetchall()
        return {f: v for f, v in rows if v is not None}

    m = config.models
    return choose_columns(eligible, m.market_factors, m.market_factors_max, previous, variances)


def _panel(con, config: Config | None = None, frequency: str = "daily", *, since=None,
           factors: list[str] | None = None) -> Panel | None:
    """Assets' excess returns and the factors' returns on their common complete dates,
    from ``since`` on (the whole history when None)."""
    assets = con.execute(sql("assets.assets")).df()
    assets = assets[assets["frequency"] == frequency]
    if assets.empty:
        return None
    factors = exposure_factors(con, config, frequency) if factors is None else factors
    if not factors:
        return None
    since = since if since is not None else date(1, 1, 1)
    rets = con.execute(sql("assets.asset_returns_since"), [since]).df()
    rets = rets[rets["asset_id"].isin(assets["asset_id"])]
    rf = con.execute(sql("assets.risk_free_since"), [frequency, since]).df()
    fac = con.execute(sql("assets.factor_returns_of_since"), [list(factors), since]).df()
    wide_f = _wide(fac, "factor_id").reindex(columns=sorted(factors)).dropna()
    if wide_f.empty:
        return None
    wide_a = _wide(rets, "asset_id")
    rf = rf.set_index("date")["rate"]
    excess = wide_a.sub(rf, axis=0)
    idx = wide_f.index.intersection(excess.dropna(how="all").index).intersection(rf.index)
    if len(idx) == 0:
        return None
    return Panel(pd.DatetimeIndex(idx), excess.loc[idx], wide_f.loc[idx], frequency)


def _wide(frame: pd.DataFrame, column: str) -> pd.DataFrame:
    """Long rows (``column``, date, ret) as a dates x ids table, both sorted; NaN where no
    row (``DataFrame.pivot``'s result, without its sort of the long rows: 4x faster on
    the 750,000 rows of a day's exposure update)."""
    ids, id_values = pd.factorize(frame[column], sort=True)
    days, day_values = pd.factorize(frame["date"], sort=True)
    wide = np.full((len(day_values), len(id_values)), np.nan)
    wide[days, ids] = frame["ret"].to_numpy(dtype=float)
    return pd.DataFrame(wide, index=pd.Index(day_values, name="date"), columns=pd.Index(list(id_values)))


def _window(config: Config, frequency: str) -> int:
    return config.assets.window_daily if frequency == "daily" else config.assets.window_monthly


# asset dates read before the first date to estimate, beyond the window's: the window
# counts the panel's complete rows, which a missing factor or risk-free row thins out
READ_MARGIN = 64


def update_exposures(store: Store, config: Config, *, row_counts: dict | None = None) -> int:
    """Store rolling exposures for dates not yet estimated; return rows written.

    A revision of an asset return or of the risk-free rate since the last write
    supersedes the exposures from the revised date on and re-derives them; so does a
    change of the factor set (:func:`exposure_factors`), from the first date. A day's
    update reads the last window of rows (with a margin), not the whole history: the
    rolling estimates of the new dates only see that window, and when the read turns out
    to hold fewer than a window of complete rows before them it is done again in full.
    ``row_counts``: see :func:`exposure_factors`.
    """
    window = _window(config, "daily")
    with store.connect() as con:
        if con.execute(sql("assets.assets")).df().query("frequency == 'daily'").empty:
            return 0
        factors = exposure_factors(con, config, row_counts=row_counts)
        if not factors:
            return 0
        last = con.execute(sql("assets.last_exposure_date")).fetchone()[0]
        vintage = int(con.execute(sql("assets.exposure_vintage")).fetchone()[0])
        last_write = con.execute(sql("assets.last_exposure_write")).fetchone()[0]
        stored_factors = [r[0] for r in con.execute(sql("assets.latest_exposure_factors")).fetchall()]
        revised_from = None
        if last_write is not None:
            revised_from = con.execute(sql("assets.asset_revisions_since"), [last_write]).fetchone()[0]
        supersede, first_new = None, None              # first_new: the first date to estimate
        if last is None:
            vintage = max(vintage, 0) + 1
        elif sorted(stored_factors) != sorted([ALPHA, *factors]):
            vintage, supersede = vintage + 1, date(1, 1, 1)      # another factor set: all again
        elif revised_from is not None and pd.Timestamp(revised_from) <= pd.Timestamp(last):
            vintage, supersede = vintage + 1, pd.Timestamp(revised_from).date()
            first_new = supersede
        else:
            first_new = (pd.Timestamp(last) + pd.Timedelta(days=1)).date()
        if supersede is None and first_new is not None:
            newest = con.execute(sql("assets.last_asset_date")).fetchone()[0]
            if newest is None or newest < first_new:
                return 0                                    # no asset rows after the last estimate
        since = None
        if first_new is not None:
            row = con.execute(sql("assets.asset_date_before"), [first_new, window + READ_MARGIN]).fetchone()
            since = row[0] if row else None
        panel = _panel(con, config, factors=factors, since=since)
        if panel is not None and since is not None and \
                int(panel.dates.searchsorted(pd.Timestamp(first_new))) < window - 1:
            panel = _panel(con, config, factors=factors)          # too thin: read it all
    if panel is None:
        return 0
    model = RollingExposureModel(window)
    dates = panel.dates
    start = 0 if first_new is None else int(dates.searchsorted(pd.Timestamp(first_new)))
    if start >= len(dates) and supersede is None:
        return 0
    first_row = max(0, start - (window - 1))
    est = model.fit(panel.excess.iloc[first_row:], panel.factors.iloc[first_row:], output_from=start - first_row) \
        if start < len(dates) else None
    written = 0
    with store.transaction() as con:
        if supersede is not None:
            con.execute(sql("assets.supersede_exposures"), [supersede])
        for frame in (_exposure_frames(est, vintage, window) if est is not None else ()):
            con.register("incoming_frame", frame)
            con.execute(sql("assets.insert_exposure_frame"))
            con.unregister("incoming_frame")
            written += len(frame)
    return written


# stored exposure rows built and inserted at a time: a first derivation of 1,000 assets
# over 1,000 days is 3.2 million rows, which as one frame (and its copies) cost ~0.9 GB
FRAME_ROWS = 250_000


def _exposure_frames(est, vintage: int, window: int):
    """The stored rows of ``est`` as frames of about FRAME_ROWS rows, a run of dates each."""
    t, n, k = est.betas.shape
    step = max(1, FRAME_ROWS // max(n * (k + 1), 1))
    for a in range(0, t, step):
        b = min(a + step, t)
        ok = est.cell_status[a:b] == 0                           # (dates, N)
        dates = np.repeat(np.asarray(est.dates[a:b]), n)
        assets = np.tile(np.asarray(est.assets), b - a)
        parts = []
        for j, fid in enumerate((ALPHA,) + tuple(est.factors)):
            beta = est.alpha[a:b] if j == 0 else est.betas[a:b, :, j - 1]
            se = est.alpha_se[a:b] if j == 0 else est.se[a:b, :, j - 1]
            keep = (ok & np.isfinite(beta)).ravel()
            parts.append(pd.DataFrame({
                "asset_id": assets[keep], "factor_id": fid, "date": dates[keep],
                "vintage": vintage, "beta": beta.ravel()[keep],
                "beta_se": se.ravel()[keep], "window_rows": window,
            }))
        frame = pd.concat(parts, ignore_index=True)
        if len(frame):
            yield frame


@dataclass(frozen=True)
class AssetRow:
    asset_id: str
    label: str
    expected_ann: float           # beta' lambda, annualised
    expected_se_ann: float
    realised_ann: float           # realised mean excess return, annualised
    gap_ann: float                # realised - expected (pricing error)
    gap_t: float
    alpha_ann: float              # time-series alpha against the factor means (HAC t below)
    alpha_t: float
    exposures: dict               # factor_id -> (beta, se) at the latest date


@dataclass(frozen=True)
class AssetsView:
    status: str                   # ok, or why the view is unavailable
    message: str
    date: object
    factors: tuple[str, ...]
    rows: tuple[AssetRow, ...]
    filtered_premia_ann: dict     # factor -> filtered premium (annualised)
    fama_macbeth_ann: dict        # factor -> (premium, Shanken se), annualised
    inversion_ann: dict           # factor -> premium, or {} when not identified
    inversion_message: str
    grs_f: float
    grs_p: float
    sdf_max_sharpe_ann: float     # from filtered premia and the recent covariance
    sdf_max_sharpe_sample_ann: float
    sdf_max_sharpe_sample_se_ann: float
    sdf_b: dict
    sdf_pricing_errors_ann: dict  # asset -> E[m R^e], annualised (sample moments)
    window: int


def _unavailable(message: str) -> AssetsView:
    return AssetsView("unavailable", message, None, (), (), {}, {}, {}, "", float("nan"), float("nan"),
                      float("nan"), float("nan"), float("nan"), {}, {}, 0)


def load_assets_view(store: Store, config: Config) -> AssetsView:
    with store.connect() as con:
        panel = _panel(con, config)
        labels = dict(con.execute(sql("assets.assets")).df()[["asset_id", "label"]].itertuples(index=False))
        premia = con.execute(sql("assets.latest_premia")).df().set_index("factor_id")
        stored = con.execute(sql("assets.latest_exposures")).df()
    if panel is None:
        return _unavailable("No assets with returns on the factors' dates yet.")
    factors = tuple(panel.factors.columns)
    missing = [f for f in factors if f not in premia.index]
    if missing:
        return _unavailable(f"No filtered premium yet for {', '.join(missing)}; run an update first.")
    ppy = PERIODS_PER_YEAR[panel.frequency]
    window = _window(config, panel.frequency)
    lam = premia.loc[list(factors), "premium"].to_numpy(float)
    lam_var = np.diag(premia.loc[list(factors), "premium_sd"].to_numpy(float) ** 2)
    recent_a, recent_f = panel.excess.iloc[-window:], panel.factors.iloc[-window:]
    est = RollingExposureModel(window, min_nobs=min(window, len(recent_f))).fit(
        recent_a, recent_f, output_from=len(recent_f) - 1)
    betas = est.betas[-1]                                      # (N, K)
    implied = implied_excess_returns(betas, lam[None, :], periods_per_year=ppy,
                                     beta_cov=est.beta_cov_last, premia_cov=lam_var)
    ert = ExpectedReturnModel(periods_per_year=ppy).fit(panel.excess, panel.factors, premia=lam, premia_cov=lam_var)
    assets = tuple(panel.excess.columns)
    expo_map: dict[str, dict] = {}
    for r in stored.itertuples():
        expo_map.setdefault(r.asset_id, {})[r.factor_id] = (float(r.beta), float(r.beta_se))
    rows = []
    for i, a in enumerate(assets):
        realised = float(ert.realised_mean[i])
        gap = realised - float(implied.expected[i])
        se_gap = math.hypot(float(ert.realised_mean_se[i]), float(implied.se[i]))
        rows.append(AssetRow(
            asset_id=a, label=labels.get(a, a), expected_ann=float(implied.expected[i]),
            expected_se_ann=float(implied.se[i]), realised_ann=realised, gap_ann=gap,
            gap_t=gap / se_gap if se_gap > 0 else float("nan"),
            alpha_ann=float(ert.alpha[i]), alpha_t=float(ert.alpha_t[i]),
            exposures=expo_map.get(a, {f: (float(betas[i, j]), float(est.se[-1, i, j])) for j, f in enumerate(factors)}),
        ))
    grs = GRSTest().fit(panel.excess, panel.factors)
    fm = FamaMacBeth().fit(panel.excess, panel.factors)
    fm_ann = {f: (float(fm.premia[j]) * ppy, float(fm.premia_se_shanken[j]) * ppy) for j, f in enumerate(factors)}
    inv = CompleteMarketInversion().fit(panel.excess.mean().to_numpy(), betas)
    inv_ann = {f: float(inv.premia[j]) * ppy for j, f in enumerate(factors)} if inv.status == "ok" else {}
    sigma = np.cov(recent_f.to_numpy(), rowvar=False, ddof=1)
    b_filtered = np.linalg.solve(sigma, lam)
    hj_filtered = math.sqrt(max(float(lam @ b_filtered), 0.0)) * math.sqrt(ppy)
    sdf = LinearSDF(periods_per_year=ppy).fit(panel.factors, panel.excess)
    return AssetsView(
        status="ok", message="", date=panel.dates[-1].date(), factors=factors, rows=tuple(rows),
        filtered_premia_ann={f: float(lam[j]) * ppy for j, f in enumerate(factors)},
        fama_macbeth_ann=fm_ann, inversion_ann=inv_ann, inversion_message=inv.message,
        grs_f=float(grs.grs_f), grs_p=float(grs.grs_pvalue),
        sdf_max_sharpe_ann=hj_filtered, sdf_max_sharpe_sample_ann=float(sdf.max_sharpe_annual),
        sdf_max_sharpe_sample_se_ann=float(sdf.max_sharpe_annual_se),
        sdf_b={f: float(b_filtered[j]) for j, f in enumerate(factors)},
        sdf_pricing_errors_ann={a: float(sdf.asset_pricing_errors[i]) * ppy for i, a in enumerate(assets)},
        window=window,
    )
