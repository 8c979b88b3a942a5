"""Turning model outputs into stored warnings, per factor per date.

Two tiers, so the history of every warning is kept without re-running heavy checks for
each past day:

* per-date rules, evaluated for every emitted date from that date's real-time numbers:
  NOISE, IMPLAUSIBLE_SR, REGIME_AMBIG, OUTLIER;
* latest-date rules, evaluated once per update at the factor's last date with the whole
  history: all of the above plus significance and multiple testing across the tracked
  set, fragility, the hindsight gap, misfit diagnostics, drift, fit status and data
  quality (stale, gaps, repeated values, revisions, frequency).

Rows are plain dicts ready for the ``warnings`` table.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from tracker.estimation import significance as sig
from tracker.estimation import warning_rules as wr
from tracker.service.factor_models import (
    MODEL_PREMIUM,
    MODEL_REGIMES,
    PERIODS_PER_YEAR,
    FactorOutput,
    hindsight_premium,
)


HINDSIGHT_ROWS = 21


def _row(subject: str, date, w: wr.Warning) -> dict:
    return {
        "subject_id": subject, "date": date, "code": w.code, "severity": w.severity,
        "message": w.message, "detail": w.detail,
        "value": float(w.value) if w.value is not None and math.isfinite(w.value) else None,
        "threshold": float(w.threshold) if w.threshold is not None and math.isfinite(w.threshold) else None,
        "source": w.source,
    }


def per_date_warnings(out: FactorOutput, frequency: str, first_index: int, n_prior: int,
                      th: wr.WarningThresholds) -> list[dict]:
    """Cheap rules for rows ``first_index..`` of ``out`` (``n_prior`` rows came before them)."""
    ppy = PERIODS_PER_YEAR[frequency]
    rows: list[dict] = []
    sd = np.sqrt(out.premium_var)
    sharpe = out.premium / out.vol_forecast * math.sqrt(ppy)
    for i in range(first_index, out.dates.size):
        if not math.isfinite(out.returns[i]):
            continue
        date = out.dates[i]
        found = []
        w = wr.rule_noise(out.premium[i], sd[i], th, out.vol_forecast[i], ppy)
        if w:
            found.append(w)
        years = (n_prior + i + 1) / ppy
        w = wr.rule_implausible_sharpe(sharpe[i], years, th)
        if w:
            found.append(w)
        if out.regime_filtered is not None and np.all(np.isfinite(out.regime_filtered[i])):
            w = wr.rule_regime_ambiguous(out.regime_filtered[i][None, :], th)
            if w:
                found.append(w)
        if math.isfinite(out.std_error[i]) and abs(out.std_error[i]) > th.outlier_sd:
            w = wr.rule_outlier(out.std_error[max(0, i - th.outlier_lookback + 1): i + 1], th)
            if w:
                found.append(w)
        rows.extend(_row(out.factor_id, date, w) for w in found)
    return rows


@dataclass(frozen=True)
class LatestContext:
    """Set-level facts for the latest-date rules of one factor."""

    frequency: str
    is_new: bool
    t_stat: float
    p_value: float
    p_adjusted: float
    latest_date_in_set: np.datetime64 | None
    revision_count: int
    fit_status: str
    fit_message: str
    regime_status: str
    regime_message: str


def significance_of(returns: np.ndarray) -> sig.MeanTest:
    """Newey & West (1987) HAC test of the factor's mean over its whole history."""
    return sig.newey_west_mean(returns[np.isfinite(returns)])


def latest_warnings(out: FactorOutput, ctx: LatestContext, th: wr.WarningThresholds,
                    full_dates: np.ndarray, full_returns: np.ndarray,
                    full_premium: np.ndarray, full_premium_var: np.ndarray,
                    full_std_error: np.ndarray, full_loglik_t: np.ndarray,
                    full_regime_filtered: np.ndarray | None) -> list[dict]:
    """All rules at the factor's last date, over its whole history (arrays aligned)."""
    if full_dates.size == 0:
        return []
    from tracker.service.factor_models import refiltered_premium

    ppy = PERIODS_PER_YEAR[ctx.frequency]
    last = full_dates.size - 1
    sd = np.sqrt(full_premium_var)
    vol = out.vol_forecast[-1] if out.vol_forecast.size else float("nan")
    n_drop = th.fragile_drop_last
    finite = np.isfinite(full_returns)
    smoothed = hindsight_premium(out.params, full_returns)
    q_half = refiltered_premium(out.params, full_returns, q_scale=0.5)[0]
    q_double = refiltered_premium(out.params, full_returns, q_scale=2.0)[0]
    drop_last = full_premium[last - n_drop] if last - n_drop >= 0 else None
    probs = None
    if full_regime_filtered is not None:
        ok = np.all(np.isfinite(full_regime_filtered), axis=1)
        probs = full_regime_filtered[ok]
    inputs = wr.FactorWarningInputs(
        premium=float(full_premium[last]),
        premium_sd=float(sd[last]),
        volatility=float(vol),
        periods_per_year=ppy,
        t_stat=ctx.t_stat,
        p_value=ctx.p_value,
        p_value_adjusted=ctx.p_adjusted,
        is_new_factor=ctx.is_new,
        premium_drop_last=None if drop_last is None else float(drop_last),
        premium_q_half=q_half,
        premium_q_double=q_double,
        # the hindsight gap is judged over the last month of real-time estimates: what the
        # desk saw recently against what the whole sample now says about those dates
        filtered_path=full_premium[-HINDSIGHT_ROWS:],
        smoothed_path=None if smoothed is None else smoothed[-HINDSIGHT_ROWS:],
        filtered_sd_path=sd[-HINDSIGHT_ROWS:],
        sharpe_annual=float(full_premium[last] / vol * math.sqrt(ppy)) if vol and vol > 0 else None,
        history_years=float(finite.sum() / ppy),
        regime_probabilities=probs,
        regime_status=ctx.regime_status,
        regime_message=ctx.regime_message,
        standardized_errors=full_std_error[np.isfinite(full_std_error)],
        predictive_loglik=full_loglik_t[np.isfinite(full_loglik_t)],
        fit_status=ctx.fit_status,
        fit_message=ctx.fit_message,
        frequency=ctx.frequency,
        dates=full_dates[finite],
        values=full_returns[finite],
        latest_date_in_set=ctx.latest_date_in_set,
        revision_count=ctx.revision_count,
    )
    return [_row(out.factor_id, full_dates[last], w) for w in wr.evaluate_all(inputs, th)]


def fit_status_of(fits: dict, model: str) -> tuple[str, str]:
    rec = fits.get(model)
    if rec is None:
        return "failed", "No fit is stored for this model."
    return rec["status"], rec["message"]


__all__ = [
    "LatestContext", "latest_warnings", "per_date_warnings", "significance_of", "fit_status_of",
    "MODEL_PREMIUM", "MODEL_REGIMES",
]
