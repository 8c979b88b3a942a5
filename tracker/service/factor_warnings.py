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

import dataclasses
import math
from dataclasses import dataclass

import numpy as np

from scipy import stats

from tracker.estimation import significance as sig
from tracker.estimation import warning_rules as wr
from tracker.service.factor_models import (
    HINDSIGHT_ROWS,
    MODEL_PREMIUM,
    MODEL_REGIMES,
    PERIODS_PER_YEAR,
    FactorOutput,
    hindsight_premium,
)
from tracker.service.history_summary import HistorySummary


def _row(subject: str, date, w: wr.Warning) -> dict:
    return {
        "subject_id": subject, "date": date, "code": w.code, "severity": w.severity,
        "message": w.message, "detail": w.detail,
        "value": float(w.value) if w.value is not None and math.isfinite(w.value) else None,
        "threshold": float(w.threshold) if w.threshold is not None and math.isfinite(w.threshold) else None,
        "source": w.source,
    }


class WarningRows(list):
    """Warning rows (dicts, as :func:`per_date_warnings` makes them) that cross processes
    as columns.

    A refit's worker sends every date's rows of a long history back: ~15,000 rows a
    factor over 15,000 days, each row's date a numpy scalar that pickle handles one at a
    time (0.08 s of the ~0.12 s it took to pickle a factor's whole output). As columns,
    the dates go as one array. Unpickled, it is the same list of the same dicts.
    """

    def __reduce__(self):
        keys = tuple(self[0]) if self else ()
        if not keys or "date" not in keys or any(tuple(r) != keys for r in self):
            return (WarningRows, (list(self),))
        cols = [[r[k] for r in self] for k in keys]
        at = keys.index("date")
        cols[at] = np.array(cols[at])
        return (_warning_rows, (keys, cols))


def _warning_rows(keys: tuple, cols: list) -> WarningRows:
    return WarningRows(dict(zip(keys, values)) for values in zip(*cols))


def run_factor_with_warnings(args: tuple) -> FactorOutput:
    """Top-level (picklable) worker task: :func:`run_factor` and the per-date warnings of
    the rows it emits, so a refit's per-date rules run in the workers beside the fits.

    ``args`` is ``(task, thresholds)``; only for tasks that start at the first row (fits,
    backfills), where no stored row comes before the block.
    """
    from tracker.service.factor_models import run_factor

    task, th = args
    out = run_factor(task)
    if task.emit_from is None:
        return out
    m = (out.dates >= task.emit_from) & np.isfinite(out.returns)
    rows = per_date_warnings(out, task.frequency, int(np.argmax(m)), 0, th) if m.any() else []
    return dataclasses.replace(out, dated_warnings=WarningRows(rows))


def per_date_warnings(out: FactorOutput, frequency: str, first_index: int, n_prior: int,
                      th: wr.WarningThresholds, end_index: int | None = None) -> list[dict]:
    """Cheap rules for rows ``first_index..end_index-1`` of ``out`` (default: to the end;
    ``n_prior`` rows came before them).

    Each rule's firing condition is evaluated for every row at once; the rule itself (and
    its text) is then called only on the rows where it fires, in the same order as
    :func:`per_date_warnings_loop`, the row-by-row reference twin. A refit emits every
    date of a long history, so this is on the refit's path (0.2 s a factor over 6,500
    rows row by row).
    """
    end = out.dates.size if end_index is None else end_index
    if end <= first_index:
        return []
    ppy = PERIODS_PER_YEAR[frequency]
    sl = slice(first_index, end)
    ok = np.isfinite(out.returns[sl])
    mu, vol = out.premium[sl], out.vol_forecast[sl]
    with np.errstate(invalid="ignore", divide="ignore"):
        sd = np.sqrt(out.premium_var[sl])
        sharpe = mu / vol * math.sqrt(ppy)
    noise_at = wr.rule_noise_many(np.where(ok, mu, np.nan), sd, th, vol, ppy)
    noise = np.zeros(ok.size, bool)
    noise[list(noise_at)] = True
    years = (n_prior + np.arange(first_index, end) + 1) / ppy
    implausible = (ok & np.isfinite(sharpe) & (years >= th.implausible_min_years)
                   & (np.abs(sharpe) > th.implausible_sharpe))
    if out.regime_filtered is not None:
        probs = out.regime_filtered[sl]
        complete = np.all(np.isfinite(probs), axis=1)
        top = np.where(complete[:, None], probs, 1.0).max(axis=1)
        ambiguous = ok & complete & (top < th.regime_ambiguous_prob)
    else:
        ambiguous = np.zeros(ok.size, bool)
    se = out.std_error[sl]
    with np.errstate(invalid="ignore"):
        outlier = ok & np.isfinite(se) & (np.abs(se) > th.outlier_sd)
    rows: list[dict] = []
    fid = out.factor_id
    # one pass over the rows where something fires (most of a long history, for NOISE),
    # with the flags and dates taken out of numpy once rather than element by element
    fire = np.flatnonzero(noise | implausible | ambiguous | outlier)
    days = list(out.dates[first_index + fire])              # numpy day scalars, as stored
    flags = (noise[fire].tolist(), implausible[fire].tolist(), ambiguous[fire].tolist(),
             outlier[fire].tolist())
    for j, date, is_noise, is_implausible, is_ambiguous, is_outlier in zip(fire.tolist(), days, *flags):
        if is_noise:
            rows.append(_row(fid, date, noise_at[j]))
        if not (is_implausible or is_ambiguous or is_outlier):
            continue
        i = first_index + j
        found = []
        if is_implausible:
            found.append(wr.rule_implausible_sharpe(float(sharpe[j]), float(years[j]), th))
        if is_ambiguous:
            found.append(wr.rule_regime_ambiguous(out.regime_filtered[i][None, :], th))
        if is_outlier:
            found.append(wr.rule_outlier(out.std_error[max(0, i - th.outlier_lookback + 1): i + 1], th))
        rows.extend(_row(fid, date, w) for w in found if w)
    return rows


def per_date_warnings_loop(out: FactorOutput, frequency: str, first_index: int, n_prior: int,
                           th: wr.WarningThresholds, end_index: int | None = None) -> list[dict]:
    """Row-by-row reference twin of :func:`per_date_warnings` (tests)."""
    ppy = PERIODS_PER_YEAR[frequency]
    rows: list[dict] = []
    sd = np.sqrt(out.premium_var)
    sharpe = out.premium / out.vol_forecast * math.sqrt(ppy)
    for i in range(first_index, out.dates.size if end_index is None else end_index):
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
    if out.extras:
        # the run's own pass already gave the latest fragility and hindsight values over
        # this whole history (factor_models._latest_extras; a twin test holds them equal)
        smoothed = out.extras["hindsight"]
        q_half, q_double = out.extras["q_half"], out.extras["q_double"]
    else:
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


def latest_warnings_from_summary(out: FactorOutput, ctx: LatestContext, th: wr.WarningThresholds,
                                 summary: HistorySummary,
                                 diag: sig.ResidualDiagnostics | None) -> list[dict]:
    """:func:`latest_warnings` of an advance, from the history summary (see
    :mod:`tracker.service.history_summary`) already extended with this run's rows.

    The rules that read the whole history get the same statistics from the summary:
    DRIFT its drift statistic, GAP / REPEATED / FREQ_MISMATCH its running statistics,
    MISFIT ``diag`` (:func:`batch_misfit_diagnostics` of the summary's errors), OUTLIER and
    STALE its tails; FRAGILE and HINDSIGHT_GAP take ``out.extras``. The other rules run on
    bounded tails that hold every row they look at. Same rows as the whole-history path
    (to rounding: a held twin test compares them).
    """
    ppy = PERIODS_PER_YEAR[ctx.frequency]
    prem = np.asarray(summary.premium, dtype=float)
    sd = np.sqrt(np.asarray(summary.premium_var, dtype=float))
    vol = out.vol_forecast[-1] if out.vol_forecast.size else float("nan")
    n_drop = th.fragile_drop_last
    last = summary.n_rows - 1
    drop_last = prem[prem.size - 1 - n_drop] if last - n_drop >= 0 else None
    probs = None
    if out.regime_filtered is not None:
        k = out.regime_filtered.shape[1]
        rows = [r for r in summary.regimes if len(r) == k]
        probs = np.array(rows, dtype=float).reshape(len(rows), k)
    smoothed = out.extras.get("hindsight")
    inputs = wr.FactorWarningInputs(
        premium=float(prem[-1]), premium_sd=float(sd[-1]), volatility=float(vol), periods_per_year=ppy,
        t_stat=ctx.t_stat, p_value=ctx.p_value, p_value_adjusted=ctx.p_adjusted, is_new_factor=ctx.is_new,
        premium_drop_last=None if drop_last is None else float(drop_last),
        premium_q_half=out.extras.get("q_half"), premium_q_double=out.extras.get("q_double"),
        filtered_path=prem[-HINDSIGHT_ROWS:],
        smoothed_path=None if smoothed is None else np.asarray(smoothed)[-HINDSIGHT_ROWS:],
        filtered_sd_path=sd[-HINDSIGHT_ROWS:],
        sharpe_annual=float(prem[-1] / vol * math.sqrt(ppy)) if vol and vol > 0 else None,
        history_years=float(summary.returns.n / ppy),
        regime_probabilities=probs, regime_status=ctx.regime_status, regime_message=ctx.regime_message,
        standardized_errors=None, predictive_loglik=None,
        fit_status=ctx.fit_status, fit_message=ctx.fit_message, frequency=ctx.frequency,
        dates=None, values=None, latest_date_in_set=ctx.latest_date_in_set, revision_count=ctx.revision_count,
    )
    found = wr.evaluate_all(inputs, th)
    errors = np.asarray(summary.errors, dtype=float)
    last_finite = None if summary.last_date is None else np.datetime64(summary.last_date, "D")
    extra = [
        wr.rule_misfit_normal(diag, th), wr.rule_misfit_serial(diag, th),
        wr.rule_drift(summary.drift(th.drift_window), th),
        wr.rule_stale(last_finite, ctx.latest_date_in_set, ctx.frequency, th, None),
        wr.rule_outlier(errors, th) if errors.size else None,
        *summary.data_quality_warnings(th),
    ]
    order = {code: i for i, code in enumerate(wr.CATALOGUE)}
    found = sorted(found + [w for w in extra if w is not None], key=lambda w: order.get(w.code, len(order)))
    return [_row(out.factor_id, out.dates[-1], w) for w in found]


def batch_misfit_diagnostics(tails: dict[str, np.ndarray],
                             th: wr.WarningThresholds) -> dict[str, sig.ResidualDiagnostics]:
    """:func:`wr.misfit_diagnostics` of many factors at once.

    ``tails`` maps factor id -> its finite standardized errors (the last ``misfit_window``
    or more). Jarque-Bera and Ljung-Box are vectorised over the factors that share a
    length and a lag count (after a day's update: all of them), with the moments
    statsmodels' ``jarque_bera`` (scipy's biased skewness and kurtosis) and
    ``acorr_ljungbox`` (unadjusted autocorrelations, Q = n (n+2) sum r_k^2 / (n-k)) use;
    the rest go through the library one by one.
    """
    out: dict[str, sig.ResidualDiagnostics] = {}
    groups: dict[tuple[int, int], list[tuple[str, np.ndarray]]] = {}
    for fid, e in tails.items():
        e = np.asarray(e, dtype=float)
        e = e[np.isfinite(e)]
        if th.misfit_window > 0:
            e = e[-th.misfit_window:]
        lags = min(th.ljung_box_lags, e.size // 5)
        if e.size < sig.MIN_DIAGNOSTIC_OBS or lags < 1 or lags >= e.size - 1:
            out[fid] = sig.residual_diagnostics(e, lags=lags)
        else:
            groups.setdefault((e.size, lags), []).append((fid, e))
    for (n, lags), members in groups.items():
        if len(members) == 1:
            fid, e = members[0]
            out[fid] = sig.residual_diagnostics(e, lags=lags)
            continue
        x = np.vstack([e for _, e in members])                      # (M, n)
        d = x - x.mean(axis=1, keepdims=True)
        m2 = np.mean(d**2, axis=1)
        m3 = np.mean(d**3, axis=1)
        m4 = np.mean(d**4, axis=1)
        with np.errstate(divide="ignore", invalid="ignore"):
            skew = m3 / m2**1.5
            kurt = 3.0 + (m4 / m2**2.0 - 3.0)
        jb = (n / 6.0) * (skew**2 + 0.25 * (kurt - 3.0) ** 2)
        jb_p = stats.chi2.sf(jb, 2)
        acov0 = np.einsum("mt,mt->m", d, d)
        q = np.zeros(len(members))
        for k in range(1, lags + 1):
            r = np.einsum("mt,mt->m", d[:, k:], d[:, :-k]) / acov0
            q += r * r / (n - k)
        q *= n * (n + 2)
        q_p = stats.chi2.sf(q, lags)
        for i, (fid, _) in enumerate(members):
            out[fid] = sig.ResidualDiagnostics("ok", "", n, lags, float(jb[i]), float(jb_p[i]), float(skew[i]),
                                               float(kurt[i]), float(q[i]), float(q_p[i]))
    return out


def fit_status_of(fits: dict, model: str) -> tuple[str, str]:
    rec = fits.get(model)
    if rec is None:
        return "failed", "No fit is stored for this model."
    return rec["status"], rec["message"]


__all__ = [
    "HINDSIGHT_ROWS", "LatestContext", "batch_misfit_diagnostics", "latest_warnings",
    "latest_warnings_from_summary", "per_date_warnings", "significance_of", "fit_status_of",
    "MODEL_PREMIUM", "MODEL_REGIMES",
]
