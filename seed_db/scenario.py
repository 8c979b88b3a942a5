"""The invented demo scenario: the research desk of Larkspur Vale Pension Trust.

Every name and number here is invented. The desk follows ten factors and ten asset
sleeves with daily returns from January 2001 to November 2026. Returns are drawn from a
known process so that tests can compare estimates with the truth:

* a three-state Markov chain shared by all factors (0 calm, 1 choppy, 2 stressed) scales
  each factor's volatility and shifts its expected return; the shifts average to zero
  under the chain's stationary distribution, so the slowly drifting premium is the
  unconditional expected return;
* each true premium drifts as a small-step random walk kept within annual Sharpe ratios
  0.05 to 0.60 (the reversal factor's premium is exactly zero throughout);
* the "newly proposed" sentiment factor has three years of history, a true premium of
  zero, and a sample that happens to look good (a t-stat between 2 and 3) -- the
  data-mining trap the desk must be shown;
* asset sleeves = true exposures x factors + idiosyncratic noise + the risk-free rate.

The last :data:`HELD_BACK_DAYS` trading days are not loaded into the store: they become
drop files that ``tracker demo`` replays into the inbox.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

# Chosen among nearby seeds so that the sample is typical: no factor's sample mean lies more
# than one standard error from its true premium (a demo should not rest on a fluke).
SEED = 20261210
START = "2001-01-02"
END = "2026-11-30"
HELD_BACK_DAYS = 20
NEW_FACTOR_YEARS = 3
INSTITUTION = "Larkspur Vale Pension Trust"

REGIME_NAMES = ("calm", "choppy", "stressed")
# Daily transition matrix, rows = from, columns = to. Expected durations 1/(1-p_ii):
# calm ~ 125 days, choppy ~ 50 days, stressed ~ 25 days.
TRANSITION = np.array(
    [
        [0.992, 0.007, 0.001],
        [0.012, 0.980, 0.008],
        [0.006, 0.034, 0.960],
    ]
)
VOL_MULTIPLIER = np.array([0.75, 1.10, 2.10])


@dataclass(frozen=True)
class FactorSpec:
    factor_id: str
    label: str
    description: str
    daily_vol: float          # base daily volatility (decimal)
    sharpe: float             # starting annual Sharpe ratio of the true premium
    stress_shift: float       # premium shift in the stressed regime, in daily vols
    is_new: bool = False


FACTORS: tuple[FactorSpec, ...] = (
    FactorSpec("MKT", "Market", "Broad equity market minus the risk-free rate", 0.0110, 0.40, -0.12),
    FactorSpec("SIZE", "Size", "Small minus large capitalisation", 0.0055, 0.15, -0.04),
    FactorSpec("VALUE", "Value", "Cheap minus expensive on book-to-price", 0.0060, 0.25, -0.02),
    FactorSpec("MOM", "Momentum", "Past 12-1 month winners minus losers", 0.0085, 0.55, -0.15),
    FactorSpec("QUAL", "Quality", "Profitable, stable firms minus the rest", 0.0040, 0.45, 0.04),
    FactorSpec("LOWVOL", "Low volatility", "Low minus high trailing volatility, beta-neutral", 0.0050, 0.35, 0.06),
    FactorSpec("CARRY", "Carry", "High minus low yielding currencies and futures", 0.0045, 0.30, -0.10),
    FactorSpec("TERM", "Term", "Long minus short government bonds", 0.0032, 0.20, 0.08),
    FactorSpec("REV", "Short-term reversal", "Past month losers minus winners", 0.0065, 0.00, 0.00),
    FactorSpec("SENT", "Sentiment (proposed)", "Newly proposed text-sentiment signal, three years of history",
               0.0050, 0.00, 0.00, is_new=True),
)

ASSETS: tuple[tuple[str, str, str], ...] = (
    ("GEQ", "Global equity core", "Cap-weighted developed equity sleeve"),
    ("SCAP", "Small-cap sleeve", "Small-cap equity mandate"),
    ("VTILT", "Value tilt", "Value-tilted equity mandate"),
    ("MOVL", "Momentum overlay", "Long-short momentum overlay"),
    ("DEF", "Defensive equity", "Low-volatility, high-quality equity"),
    ("QINC", "Quality income", "Dividend and quality equity sleeve"),
    ("FXC", "FX carry programme", "Currency carry overlay"),
    ("DUR", "Duration ladder", "Government bond ladder"),
    ("MFB", "Multi-factor blend", "Equal-risk blend of style factors"),
    ("EMG", "Emerging growth", "Emerging-market equity sleeve"),
)

# True exposures (rows: assets in ASSETS order; columns: factors in FACTORS order).
EXPOSURES = np.array(
    [
        # MKT  SIZE VALUE  MOM  QUAL LOWVOL CARRY TERM  REV  SENT
        [1.00, 0.05, 0.00, 0.00, 0.05, 0.00, 0.00, 0.00, 0.00, 0.00],
        [1.05, 0.90, 0.15, 0.00, -0.1, 0.00, 0.00, 0.00, 0.05, 0.00],
        [0.95, 0.10, 0.80, -0.1, 0.00, 0.00, 0.00, 0.00, 0.00, 0.00],
        [0.00, 0.00, 0.00, 1.00, 0.00, 0.00, 0.00, 0.00, -0.1, 0.00],
        [0.70, -0.1, 0.10, 0.00, 0.30, 0.60, 0.00, 0.10, 0.00, 0.00],
        [0.85, 0.00, 0.30, 0.00, 0.60, 0.20, 0.00, 0.00, 0.00, 0.00],
        [0.10, 0.00, 0.00, 0.00, 0.00, 0.00, 1.00, 0.00, 0.00, 0.00],
        [-0.05, 0.0, 0.00, 0.00, 0.00, 0.00, 0.00, 1.10, 0.00, 0.00],
        [0.30, 0.25, 0.25, 0.25, 0.25, 0.25, 0.25, 0.00, 0.00, 0.00],
        [1.20, 0.30, 0.10, 0.00, 0.00, -0.2, 0.20, 0.00, 0.00, 0.00],
    ]
)
IDIO_VOL = np.array([0.0015, 0.0035, 0.0030, 0.0025, 0.0025, 0.0020, 0.0030, 0.0012, 0.0015, 0.0060])


@dataclass(frozen=True)
class Scenario:
    factors: pd.DataFrame          # factor_id, label, description, frequency, is_traded, is_new, start_date
    assets: pd.DataFrame           # asset_id, label, description, frequency, start_date
    factor_returns: pd.DataFrame   # factor_id, date, ret
    asset_returns: pd.DataFrame    # asset_id, date, ret (total return)
    risk_free: pd.DataFrame        # frequency, date, rate
    truth_premia: pd.DataFrame     # factor_id, date, premium (true unconditional daily premium)
    truth_regimes: pd.DataFrame    # date, regime
    truth_exposures: pd.DataFrame  # asset_id, factor_id, beta
    cutoff: pd.Timestamp           # last date loaded into the store; later dates are drop files


def _stationary(p: np.ndarray) -> np.ndarray:
    vals, vecs = np.linalg.eig(p.T)
    v = np.real(vecs[:, np.argmin(np.abs(vals - 1.0))])
    return v / v.sum()


def _regime_path(rng: np.random.Generator, n: int) -> np.ndarray:
    states = np.empty(n, dtype=np.int64)
    states[0] = 0
    u = rng.random(n)
    cum = np.cumsum(TRANSITION, axis=1)
    for t in range(1, n):
        states[t] = int(np.searchsorted(cum[states[t - 1]], u[t], side="right"))
    return np.minimum(states, 2)


def _premium_path(rng: np.random.Generator, spec: FactorSpec, n: int) -> np.ndarray:
    """Daily true premium: a reflected small-step random walk in annual Sharpe units."""
    if spec.sharpe == 0.0:
        return np.zeros(n)
    steps = rng.normal(0.0, 0.004, n)  # annual-Sharpe units per day: ~0.3 over 25 years
    sr = np.empty(n)
    sr[0] = spec.sharpe
    lo, hi = 0.05, 0.60
    for t in range(1, n):
        x = sr[t - 1] + steps[t]
        if x < lo:
            x = 2 * lo - x
        elif x > hi:
            x = 2 * hi - x
        sr[t] = x
    return sr / np.sqrt(252.0) * spec.daily_vol


def generate(seed: int = SEED) -> Scenario:
    """Build the whole scenario deterministically from ``seed``."""
    rng = np.random.default_rng(seed)
    dates = pd.bdate_range(START, END)
    n, k = len(dates), len(FACTORS)
    regimes = _regime_path(rng, n)
    pi = _stationary(TRANSITION)

    corr = np.full((k, k), 0.10)
    np.fill_diagonal(corr, 1.0)
    corr[0, 1:] = corr[1:, 0] = 0.20  # the market co-moves a little with every style
    chol = np.linalg.cholesky(corr)
    shocks = rng.standard_normal((n, k)) @ chol.T

    rets = np.empty((n, k))
    premia = np.empty((n, k))
    for j, spec in enumerate(FACTORS):
        premia[:, j] = _premium_path(rng, spec, n)
        shift = np.array([0.0, 0.0, spec.stress_shift]) * spec.daily_vol
        shift = shift - pi @ shift                       # zero on average over regimes
        vol = spec.daily_vol * VOL_MULTIPLIER[regimes]
        rets[:, j] = premia[:, j] + shift[regimes] + vol * shocks[:, j]

    new_j = next(j for j, s in enumerate(FACTORS) if s.is_new)
    new_start_idx = n - NEW_FACTOR_YEARS * 252
    spec = FACTORS[new_j]
    # The trap: a zero-premium series whose short sample looks good by chance. Draws are
    # tried in a fixed order until one has an in-sample t-stat in [2, 3] -- what a desk
    # mining many candidate signals ends up proposing.
    attempt = 0
    while True:
        trial = np.random.default_rng([seed, 7, attempt]).standard_normal(n - new_start_idx)
        sample = trial * spec.daily_vol * VOL_MULTIPLIER[regimes[new_start_idx:]]
        in_sample = sample[: -HELD_BACK_DAYS]
        t_stat = in_sample.mean() / in_sample.std(ddof=1) * np.sqrt(len(in_sample))
        if 2.0 <= t_stat <= 3.0:
            break
        attempt += 1
    rets[:new_start_idx, new_j] = np.nan
    rets[new_start_idx:, new_j] = sample
    premia[:new_start_idx, new_j] = np.nan

    rf_annual = 0.025 + 0.02 * np.sin(np.linspace(0.0, 3.0 * np.pi, n)) + np.cumsum(rng.normal(0, 0.0004, n))
    rf_daily = np.clip(rf_annual, 0.0, 0.08) / 252.0

    idio = rng.standard_normal((n, len(ASSETS))) * IDIO_VOL
    f_filled = np.nan_to_num(rets)
    asset_excess = f_filled @ EXPOSURES.T + idio
    asset_total = asset_excess + rf_daily[:, None]

    factor_ids = [s.factor_id for s in FACTORS]
    asset_ids = [a[0] for a in ASSETS]
    fr = pd.DataFrame(rets, index=dates, columns=factor_ids).rename_axis("date").reset_index()
    fr = fr.melt(id_vars="date", var_name="factor_id", value_name="ret").dropna()
    ar = pd.DataFrame(asset_total, index=dates, columns=asset_ids).rename_axis("date").reset_index()
    ar = ar.melt(id_vars="date", var_name="asset_id", value_name="ret")
    tp = pd.DataFrame(premia, index=dates, columns=factor_ids).rename_axis("date").reset_index()
    tp = tp.melt(id_vars="date", var_name="factor_id", value_name="premium").dropna()

    factors = pd.DataFrame(
        {
            "factor_id": factor_ids,
            "label": [s.label for s in FACTORS],
            "description": [s.description for s in FACTORS],
            "frequency": "daily",
            "is_traded": True,
            "is_new": [s.is_new for s in FACTORS],
            "start_date": [dates[new_start_idx] if s.is_new else dates[0] for s in FACTORS],
        }
    )
    assets = pd.DataFrame(
        {
            "asset_id": asset_ids,
            "label": [a[1] for a in ASSETS],
            "description": [a[2] for a in ASSETS],
            "frequency": "daily",
            "start_date": dates[0],
        }
    )
    exposures = pd.DataFrame(EXPOSURES, index=asset_ids, columns=factor_ids)
    exposures = exposures.rename_axis("asset_id").reset_index().melt(
        id_vars="asset_id", var_name="factor_id", value_name="beta"
    )
    return Scenario(
        factors=factors,
        assets=assets,
        factor_returns=fr[["factor_id", "date", "ret"]].reset_index(drop=True),
        asset_returns=ar[["asset_id", "date", "ret"]].reset_index(drop=True),
        risk_free=pd.DataFrame({"frequency": "daily", "date": dates, "rate": rf_daily}),
        truth_premia=tp[["factor_id", "date", "premium"]].reset_index(drop=True),
        truth_regimes=pd.DataFrame({"date": dates, "regime": regimes}),
        truth_exposures=exposures,
        cutoff=dates[-HELD_BACK_DAYS - 1],
    )


def drop_file_text(scn: Scenario, day: pd.Timestamp) -> str:
    """The drop file for one held-back trading day, in the documented drop format."""
    iso = day.strftime("%Y-%m-%d")
    fr = scn.factor_returns[scn.factor_returns["date"] == day]
    ar = scn.asset_returns[scn.asset_returns["date"] == day]
    rf = scn.risk_free[scn.risk_free["date"] == day]
    lines = [
        f"-- {INSTITUTION} research desk: end-of-day returns for {iso} (invented demo data)",
        "INSERT INTO factor_returns (factor_id, date, ret) VALUES",
        ",\n".join(f"  ('{r.factor_id}', DATE '{iso}', {r.ret:.10f})" for r in fr.itertuples()) + ";",
        "INSERT INTO asset_returns (asset_id, date, ret) VALUES",
        ",\n".join(f"  ('{r.asset_id}', DATE '{iso}', {r.ret:.10f})" for r in ar.itertuples()) + ";",
        "INSERT INTO risk_free (date, rate) VALUES",
        ",\n".join(f"  (DATE '{iso}', {r.rate:.12f})" for r in rf.itertuples()) + ";",
        "",
    ]
    return "\n".join(lines)


def held_back_days(scn: Scenario) -> list[pd.Timestamp]:
    dates = scn.truth_regimes["date"]
    return list(dates[dates > scn.cutoff])
