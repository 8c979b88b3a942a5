"""The warning catalogue and the pure rules that decide when each warning fires.

A warning says, in plain words, why an estimate should not be taken at face
value: it is noise, it does not survive multiple testing, it is fragile, the
regime model is unsure, the model does not fit, or the data look wrong.

Every warning has a stable short code (see ``CATALOGUE``). Thresholds live in
one frozen dataclass, ``WarningThresholds``, whose field names are the keys of
the ``[warnings]`` section of the TOML config. Rule functions take plain
numbers and arrays (never database rows) and return a ``Warning`` or ``None``;
an input that is ``None`` (not available) means that rule does not fire.
``evaluate_all`` runs every rule for one factor at one date.
"""

from __future__ import annotations

import functools
import math
from dataclasses import asdict, dataclass, fields
from types import MappingProxyType
from typing import Mapping, Sequence

import numpy as np
from scipy import stats

from tracker.estimation import significance as sig

__all__ = [
    "SEVERITIES",
    "FREQUENCY_DAYS",
    "WarningSpec",
    "CATALOGUE",
    "Warning",
    "WarningThresholds",
    "DriftStatistic",
    "predictive_loglik_drift",
    "FactorWarningInputs",
    "evaluate_all",
    "tracked_set_adjusted_p",
    "tracked_set_significance_warnings",
    "rule_noise",
    "rule_multiple_testing",
    "rule_hurdle",
    "rule_fragile",
    "rule_hindsight_gap",
    "rule_implausible_sharpe",
    "rule_regime_ambiguous",
    "rule_regime_flip",
    "rule_regime_unfit",
    "rule_misfit_normal",
    "rule_misfit_serial",
    "rule_drift",
    "rule_fit_failed",
    "rule_stale",
    "rule_gap",
    "rule_outlier",
    "rule_revised",
    "rule_repeated",
    "rule_freq_mismatch",
    "misfit_diagnostics",
    "longest_run",
    "format_number",
]

SEVERITIES = ("info", "caution", "alert")

#: Typical calendar days between rows, per declared frequency (daily = business
#: days, whose median spacing is one calendar day).
FREQUENCY_DAYS: Mapping[str, float] = MappingProxyType({
    "daily": 1.0, "weekly": 7.0, "monthly": 30.44, "quarterly": 91.31, "annual": 365.25,
})

_FAILED_STATUSES = frozenset({"failed", "not_converged", "unidentified", "too_little_data"})


# --------------------------------------------------------------------------- #
# Catalogue
# --------------------------------------------------------------------------- #


@dataclass(frozen=True)
class WarningSpec:
    """One entry of the catalogue.

    Attributes
    ----------
    code : str
        Stable short code, e.g. 'NOISE'.
    severity : {'info', 'caution', 'alert'}
    message : str
        One line in plain words, shown in lists.
    detail_template : str
        ``str.format`` template of the longer explanation; always has the
        placeholders ``{value}`` and ``{threshold}`` plus rule-specific ones.
    threshold_key : str or None
        Field of ``WarningThresholds`` that sets the trigger; None for
        warnings raised by a model status rather than a number.
    other_keys : tuple of str
        Further ``WarningThresholds`` fields the rule reads.
    source : str
        The paper behind the rule, or 'common practice'.
    """

    code: str
    severity: str
    message: str
    detail_template: str
    threshold_key: str | None
    other_keys: tuple[str, ...]
    source: str


_SPECS = (
    WarningSpec(
        "NOISE", "caution",
        "The premium estimate cannot be told apart from zero.",
        "The premium is {value} filtered standard deviations from zero; it is flagged "
        "below {threshold} (the larger of {sd_multiple} sd and the edge of the "
        "{band_pct}% band, which {band_text} zero). {years_text}",
        "noise_sd_multiple", ("noise_band_level",),
        "Durbin & Koopman (2012) filtered state variance; years needed (2/SR)^2: "
        "common practice"),
    WarningSpec(
        "FDR", "caution",
        "Significant on its own, but not after allowing for the number of factors tracked.",
        "Raw p-value {raw_p} is below the level {threshold}, but the {method_name} "
        "adjusted p-value across the tracked set is {value}, above it.",
        "significance_level", ("multiple_testing_method",),
        "Holm (1979); Benjamini & Hochberg (1995); Benjamini & Yekutieli (2001)"),
    WarningSpec(
        "HURDLE", "info",
        "A newly proposed factor below the higher t-stat bar for new factors.",
        "The t-stat is {value}; a newly proposed factor should clear |t| > {threshold} "
        "because so many candidate factors have been tried.",
        "hurdle_t", (),
        "Harvey, Liu & Zhu (2016)"),
    WarningSpec(
        "FRAGILE", "caution",
        "The premium moves a lot under a small change to the data or the model.",
        "The premium moves by {value} of its standard deviations when {which} "
        "(flagged above {threshold}).",
        "fragile_sd_multiple", ("fragile_drop_last",),
        "common practice"),
    WarningSpec(
        "HINDSIGHT_GAP", "info",
        "What was known at the time differs a lot from the hindsight estimate.",
        "The hindsight (smoothed) premium differs from the real-time (filtered) one by "
        "{value} filtered standard deviations, {ago} periods before the end "
        "(flagged above {threshold}).",
        "hindsight_gap_sd", (),
        "Durbin & Koopman (2012) filtering versus smoothing; threshold: common practice"),
    WarningSpec(
        "IMPLAUSIBLE_SR", "alert",
        "The Sharpe ratio is too high to be believable on this much history.",
        "The annual Sharpe ratio is {value} over {years} years (flagged above {threshold} "
        "on at least {min_years} years); this is more likely a data error or overfitting "
        "than a real premium.",
        "implausible_sharpe", ("implausible_min_years",),
        "common practice"),
    WarningSpec(
        "REGIME_AMBIG", "info",
        "The regime model is unsure which regime we are in.",
        "The most likely regime has filtered probability {value} (flagged below "
        "{threshold}).",
        "regime_ambiguous_prob", (),
        "Hamilton (1989) filtered probabilities; threshold: common practice"),
    WarningSpec(
        "REGIME_FLIP", "info",
        "The most likely regime changed recently.",
        "The most likely regime changed from {old} to {new} {value} periods before the "
        "latest row (flagged when fewer than {threshold} periods ago).",
        "regime_flip_periods", (),
        "Hamilton (1989) filtered probabilities; window: common practice"),
    WarningSpec(
        "REGIME_UNFIT", "caution",
        "The regime model could not be estimated reliably.",
        "The regime model status is '{status}': {status_message}",
        None, (),
        "common practice"),
    WarningSpec(
        "MISFIT_NORMAL", "info",
        "The model's forecast errors are far from normal.",
        "Jarque-Bera p-value {value} on {n_obs} standardized one-step errors (flagged "
        "below {threshold}); skewness {skewness}, kurtosis {kurtosis} (normal: 0 and 3).",
        "misfit_p_value", ("misfit_window",),
        "Jarque & Bera (1987)"),
    WarningSpec(
        "MISFIT_SERIAL", "caution",
        "The model's forecast errors are predictable from their own past.",
        "Ljung-Box p-value {value} at {lags} lags on {n_obs} standardized one-step "
        "errors (flagged below {threshold}).",
        "misfit_p_value", ("misfit_window", "ljung_box_lags"),
        "Ljung & Box (1978)"),
    WarningSpec(
        "DRIFT", "caution",
        "The model has forecast recent data much worse than usual.",
        "The mean predictive log-likelihood of the last {window} periods is {value} "
        "long-run standard errors away from its earlier norm (flagged below {threshold}).",
        "drift_z", ("drift_window",),
        "common practice"),
    WarningSpec(
        "FIT_FAILED", "alert",
        "The premium model could not be estimated.",
        "The premium model status is '{status}': {status_message}",
        None, (),
        "common practice"),
    WarningSpec(
        "STALE", "caution",
        "This series has stopped updating while others moved on.",
        "The last row is {last_date}, {value} {unit} behind the latest date in the "
        "tracked set, {set_date} (flagged at {threshold} or more).",
        "stale_business_days", ("stale_periods",),
        "common practice"),
    WarningSpec(
        "GAP", "caution",
        "Rows are missing inside the series.",
        "The longest hole is {value} missing {unit} (after {gap_start}); {total} missing "
        "in all (flagged at {threshold} or more in a row).",
        "gap_business_days", ("gap_periods",),
        "common practice"),
    WarningSpec(
        "OUTLIER", "alert",
        "A recent move is far outside what the model forecast; check the data.",
        "The largest recent move is {value} forecast standard deviations; {count} of the "
        "last {lookback} rows exceed {threshold}.",
        "outlier_sd", ("outlier_lookback",),
        "common practice"),
    WarningSpec(
        "REVISED", "caution",
        "Past values of this series have been changed.",
        "{value} past values were revised in the latest delivery (flagged at "
        "{threshold} or more).",
        "revisions_min", (),
        "common practice"),
    WarningSpec(
        "REPEATED", "alert",
        "The same value repeats many times in a row.",
        "The value {repeated} appears {value} times in a row, ending at row {end} "
        "(flagged at {threshold} or more).",
        "repeated_run_length", (),
        "common practice"),
    WarningSpec(
        "FREQ_MISMATCH", "alert",
        "The dates do not match the declared frequency.",
        "The median spacing is {value} days, against about {expected} days for "
        "{frequency} data (flagged beyond a factor of {threshold}).",
        "freq_mismatch_ratio", (),
        "common practice"),
)

#: code -> WarningSpec, in display order.
CATALOGUE: Mapping[str, WarningSpec] = MappingProxyType({s.code: s for s in _SPECS})


@dataclass(frozen=True)
class Warning:  # noqa: A001 - the name the service layer expects; shadows the builtin here only
    """One fired warning for one factor at one date.

    Attributes
    ----------
    code : str
        Key into ``CATALOGUE``.
    severity : {'info', 'caution', 'alert'}
    message : str
        One line in plain words.
    detail : str
        Longer explanation including ``value`` and ``threshold``.
    value : float
        The number that triggered the warning (NaN for status warnings).
    threshold : float
        The limit ``value`` was compared against (NaN for status warnings).
    source : str
        Paper or 'common practice'.
    """

    code: str
    severity: str
    message: str
    detail: str
    value: float
    threshold: float
    source: str

    def to_dict(self) -> dict:
        """Plain JSON-able dict (NaN stays a float NaN)."""
        return asdict(self)


def format_number(x: float) -> str:
    """How numbers appear in ``Warning.detail``: whole numbers plainly, else 3 s.f."""
    x = float(x)
    if not math.isfinite(x):
        return "n/a" if math.isnan(x) else ("inf" if x > 0 else "-inf")
    if x == int(x) and abs(x) < 1e6:
        return str(int(x))
    return f"{x:.3g}"


def format_numbers(values) -> list[str]:
    """:func:`format_number` of every value (its twin in the tests), for the many rows of a
    refit: one '%.3g' per value, and the function itself only where it differs from that
    (whole numbers, which it writes out in full, and NaN)."""
    x = np.asarray(values, dtype=float).ravel()
    out = ["%.3g" % v for v in x.tolist()]
    with np.errstate(invalid="ignore"):
        special = np.isnan(x) | ((x == np.trunc(x)) & (np.abs(x) < 1e6))
    for i in np.flatnonzero(special).tolist():
        out[i] = format_number(x[i])
    return out


def _fire(code: str, value: float, threshold: float, **extra) -> Warning:
    spec = CATALOGUE[code]
    text = {k: (format_number(v) if isinstance(v, (int, float, np.number))
                and not isinstance(v, bool) else str(v)) for k, v in extra.items()}
    detail = spec.detail_template.format(
        value=format_number(value), threshold=format_number(threshold), **text)
    return Warning(code, spec.severity, spec.message, detail, float(value),
                   float(threshold), spec.source)


# --------------------------------------------------------------------------- #
# Thresholds
# --------------------------------------------------------------------------- #


@dataclass(frozen=True)
class WarningThresholds:
    """Every number a rule compares against; keys of the TOML ``[warnings]`` section.

    Attributes
    ----------
    noise_sd_multiple : float, default 1.0
        NOISE when |premium| < this many filtered sds ...
    noise_band_level : float, default 0.90
        ... or when the central band at this level contains zero.
    significance_level : float, default 0.05
        Level for FDR (raw and adjusted p-values).
    multiple_testing_method : {'fdr_by', 'fdr_bh', 'holm'}, default 'fdr_by'
        Adjustment used by FDR: Benjamini-Yekutieli (valid under any dependence
        between factors), Benjamini-Hochberg, or Holm (family-wise).
    hurdle_t : float, default 3.0
        HURDLE when a newly proposed factor has |t| <= this (Harvey, Liu & Zhu 2016).
    fragile_sd_multiple : float, default 1.0
        FRAGILE when the premium moves by more than this many sds.
    fragile_drop_last : int, default 10
        How many latest rows the caller drops for the FRAGILE re-estimate.
    hindsight_gap_sd : float, default 2.0
        HINDSIGHT_GAP when |smoothed - filtered| exceeds this many filtered sds.
    implausible_sharpe : float, default 1.5
        IMPLAUSIBLE_SR when |annual Sharpe| exceeds this ...
    implausible_min_years : float, default 10.0
        ... on at least this many years of history.
    regime_ambiguous_prob : float, default 0.6
        REGIME_AMBIG when the top filtered regime probability is below this.
    regime_flip_periods : int, default 5
        REGIME_FLIP when the most likely regime changed fewer than this many
        rows before the latest (0 = on the latest row).
    misfit_p_value : float, default 0.01
        MISFIT_NORMAL / MISFIT_SERIAL when the JB / Ljung-Box p-value is below this.
    misfit_window : int, default 500
        Latest standardized errors used by the misfit tests (0 = all). Daily
        errors over decades reject normality almost always; a recent window
        keeps the warning informative.
    ljung_box_lags : int, default 10
        Ljung-Box lags (reduced to T // 5 on short samples).
    drift_z : float, default 3.0
        DRIFT when the drift statistic is below -drift_z.
    drift_window : int, default 21
        Recent rows compared with the earlier norm in the drift statistic.
    stale_business_days : int, default 3
        STALE (daily series) when this many business days are behind the set.
    stale_periods : int, default 1
        STALE (lower frequencies) when this many periods are behind the set.
    gap_business_days : int, default 3
        GAP (daily series) when this many business days in a row are missing;
        1-2 day holes are usually unlisted exchange holidays.
    gap_periods : int, default 1
        GAP (lower frequencies) when this many periods in a row are missing.
    outlier_sd : float, default 8.0
        OUTLIER when |standardized one-step error| exceeds this.
    outlier_lookback : int, default 5
        Latest rows checked for outliers.
    revisions_min : int, default 1
        REVISED when at least this many past values were changed.
    repeated_run_length : int, default 5
        REPEATED when a value (zeros included) repeats this many times in a row.
    freq_mismatch_ratio : float, default 1.5
        FREQ_MISMATCH when the median date spacing is more than this factor
        above or below the declared frequency's spacing.
    """

    noise_sd_multiple: float = 1.0
    noise_band_level: float = 0.90
    significance_level: float = 0.05
    multiple_testing_method: str = "fdr_by"
    hurdle_t: float = sig.HLZ_HURDLE_T
    fragile_sd_multiple: float = 1.0
    fragile_drop_last: int = 10
    hindsight_gap_sd: float = 2.0
    implausible_sharpe: float = 1.5
    implausible_min_years: float = 10.0
    regime_ambiguous_prob: float = 0.6
    regime_flip_periods: int = 5
    misfit_p_value: float = 0.01
    misfit_window: int = 500
    ljung_box_lags: int = 10
    drift_z: float = 3.0
    drift_window: int = 21
    stale_business_days: int = 3
    stale_periods: int = 1
    gap_business_days: int = 3
    gap_periods: int = 1
    outlier_sd: float = 8.0
    outlier_lookback: int = 5
    revisions_min: int = 1
    repeated_run_length: int = 5
    freq_mismatch_ratio: float = 1.5

    def __post_init__(self):
        for name in ("noise_band_level", "significance_level", "regime_ambiguous_prob",
                     "misfit_p_value"):
            v = getattr(self, name)
            if not 0.0 <= v < 1.0:
                raise ValueError(f"warnings.{name} must be in [0, 1), got {v!r}")
        if self.multiple_testing_method not in ("fdr_by", "fdr_bh", "holm"):
            raise ValueError("warnings.multiple_testing_method must be 'fdr_by', "
                             f"'fdr_bh' or 'holm', got {self.multiple_testing_method!r}")
        if self.freq_mismatch_ratio <= 1.0:
            raise ValueError("warnings.freq_mismatch_ratio must be above 1")
        for f in fields(self):
            v = getattr(self, f.name)
            if f.type in ("int", "float") and (
                    isinstance(v, bool) or not isinstance(v, (int, float)) or v < 0):
                raise ValueError(f"warnings.{f.name} must be a non-negative number, "
                                 f"got {v!r}")

    def to_dict(self) -> dict:
        return asdict(self)

    @classmethod
    def from_dict(cls, data: Mapping) -> "WarningThresholds":
        """Build from a ``[warnings]`` mapping; missing keys keep their defaults."""
        known = {f.name for f in fields(cls)}
        unknown = set(data) - known
        if unknown:
            raise ValueError(f"unknown [warnings] keys: {sorted(unknown)}")
        return cls(**dict(data))


# --------------------------------------------------------------------------- #
# Helpers
# --------------------------------------------------------------------------- #


def _finite(x) -> bool:
    return x is not None and math.isfinite(float(x))


def _status_failed(status: str | None) -> bool:
    return status is not None and status in _FAILED_STATUSES


def _as_days(dates) -> np.ndarray:
    """Sorted unique datetime64[D] array (a history's dates, already strictly increasing,
    come back as they are: np.unique sorts them again, ~1 ms over 15,000 days)."""
    d = np.asarray(dates, dtype="datetime64[D]")
    if d.ndim == 1 and (d.size < 2 or bool(np.all(d[1:] > d[:-1]))):
        return d
    return np.unique(d)


def _period_index(days: np.ndarray, frequency: str) -> np.ndarray:
    """Integer period number of each date (months, quarters, years, weeks)."""
    if frequency == "weekly":
        return days.astype("datetime64[W]").astype(np.int64)
    months = days.astype("datetime64[M]").astype(np.int64)
    if frequency == "monthly":
        return months
    if frequency == "quarterly":
        return months // 3
    if frequency == "annual":
        return days.astype("datetime64[Y]").astype(np.int64)
    raise ValueError(f"unknown frequency {frequency!r}")


def _holidays(holidays) -> np.ndarray:
    if holidays is None:
        return np.array([], dtype="datetime64[D]")
    return np.asarray(holidays, dtype="datetime64[D]")


# --------------------------------------------------------------------------- #
# Signal or noise
# --------------------------------------------------------------------------- #


@functools.lru_cache(maxsize=64)
def _two_sided_z(level: float) -> float:
    """z with P(|Z| < z) = level (cached: scipy's ppf costs ~80 us, paid once per level)."""
    return float(stats.norm.ppf(0.5 + level / 2.0))


def noise_band_z(th: WarningThresholds) -> float:
    """The two-sided z of the NOISE rule's central band (``noise_band_level``)."""
    return _two_sided_z(th.noise_band_level)


def _years_phrase(years: str) -> str:
    """'about N years', or 'under a year' where N rounds to 0 (a large Sharpe ratio of a
    still uncertain premium, early in a history)."""
    return "under a year" if years in ("0", "-0") else f"about {years} years"


def rule_noise(premium, premium_sd, th: WarningThresholds, volatility=None,
               periods_per_year=None) -> Warning | None:
    """NOISE: |mu_{t|t}| < k sd, or the central band at the chosen level contains 0.

    Parameters
    ----------
    premium, premium_sd : float
        Filtered premium mu_{t|t} and its standard deviation sqrt(P_{t|t}),
        per period.
    volatility : float, optional
        Forecast sd of the factor return per period, sqrt(c h_t); with
        ``periods_per_year`` it gives the conditional annual Sharpe ratio
        SR = mu / vol x sqrt(q) and the years needed, (2 / SR)^2.
    """
    if not (_finite(premium) and _finite(premium_sd)) or premium_sd <= 0:
        return None
    ratio = abs(premium) / premium_sd
    z_band = noise_band_z(th)
    limit = max(th.noise_sd_multiple, z_band)
    if not ratio < limit:
        return None
    years_text = ""
    if _finite(volatility) and volatility > 0 and _finite(periods_per_year):
        sr = premium / volatility * math.sqrt(periods_per_year)
        years = sig.years_for_t_stat(sr)
        years_text = (f"At the current annual Sharpe ratio of {format_number(sr)}, a "
                      f"t-stat of 2 needs {_years_phrase(format_number(round(years)))} of data."
                      if math.isfinite(years) else
                      "At a Sharpe ratio of zero no amount of data gives a t-stat of 2.")
    return _fire("NOISE", ratio, limit, sd_multiple=th.noise_sd_multiple,
                 band_pct=format_number(100 * th.noise_band_level),
                 band_text="contains" if ratio < z_band else "excludes",
                 years_text=years_text)


def rule_noise_many(premium, premium_sd, th: WarningThresholds, volatility=None,
                    periods_per_year=None) -> dict[int, Warning]:
    """:func:`rule_noise` for many rows at once: {row index: warning} where it fires.

    The same warnings, text and numbers as calling :func:`rule_noise` row by row (the
    tests compare them), at a fraction of the cost: the firing test is vectorised and
    the parts of the text that do not change between rows are formatted once. A refit
    of a long history flags most of its dates, so this runs for tens of thousands of
    rows per factor.
    """
    mu = np.asarray(premium, float)
    sd = np.asarray(premium_sd, float)
    vol = np.full(mu.shape, np.nan) if volatility is None else np.asarray(volatility, float)
    z_band = noise_band_z(th)
    limit = max(th.noise_sd_multiple, z_band)
    with np.errstate(invalid="ignore", divide="ignore"):
        ratio = np.abs(mu) / sd
        fires = np.isfinite(mu) & np.isfinite(sd) & (sd > 0) & (ratio < limit)
    ppy_ok = _finite(periods_per_year)
    root = math.sqrt(periods_per_year) if ppy_ok else math.nan
    spec = CATALOGUE["NOISE"]
    constant = dict(threshold=format_number(limit), sd_multiple=format_number(th.noise_sd_multiple),
                    band_pct=format_number(100 * th.noise_band_level))
    # the text with every constant part filled in; {0} (value) and {1} (years) stay open
    template = {band: spec.detail_template.format(value="{0}", years_text="{1}", band_text=band, **constant)
                for band in ("contains", "excludes")}
    at = np.flatnonzero(fires)
    r_all = ratio[at]
    with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
        v_all = vol[at]
        has_sr = np.isfinite(v_all) & (v_all > 0) & ppy_ok
        sr_all = np.where(has_sr, mu[at] / np.where(has_sr, v_all, 1.0) * root, np.nan)
        # as sig.years_for_t_stat(sr), rounded as round() does (half to even)
        years_all = np.where(sr_all == 0.0, np.inf, np.round((2.0 / np.abs(sr_all)) ** 2))
    r_text, sr_text = format_numbers(r_all), format_numbers(sr_all)
    finite_years = np.isfinite(years_all)
    years_text_all = format_numbers(np.where(finite_years, years_all, 0.0))
    zero_text = "At a Sharpe ratio of zero no amount of data gives a t-stat of 2."
    out: dict[int, Warning] = {}
    for n, (i, r, sr_ok, yr_ok) in enumerate(zip(at.tolist(), r_all.tolist(), has_sr.tolist(),
                                                  finite_years.tolist())):
        years_text = ""
        if sr_ok:
            years_text = (f"At the current annual Sharpe ratio of {sr_text[n]}, a "
                          f"t-stat of 2 needs {_years_phrase(years_text_all[n])} of data."
                          if yr_ok else zero_text)
        detail = template["contains" if r < z_band else "excludes"].format(r_text[n], years_text)
        out[i] = Warning("NOISE", spec.severity, spec.message, detail, r, float(limit), spec.source)
    return out


_METHOD_NAMES = {"fdr_by": "Benjamini-Yekutieli", "fdr_bh": "Benjamini-Hochberg",
                 "holm": "Holm"}


def rule_multiple_testing(p_value, p_value_adjusted, th: WarningThresholds) -> Warning | None:
    """FDR: p <= level alone but adjusted p > level.

    ``p_value_adjusted`` must come from :func:`tracked_set_adjusted_p` with the
    same thresholds (so the method matches ``th.multiple_testing_method``).
    """
    if not (_finite(p_value) and _finite(p_value_adjusted)):
        return None
    level = th.significance_level
    if p_value <= level < p_value_adjusted:
        return _fire("FDR", p_value_adjusted, level, raw_p=p_value,
                     method_name=_METHOD_NAMES[th.multiple_testing_method])
    return None


def rule_hurdle(t_stat, is_new_factor, th: WarningThresholds) -> Warning | None:
    """HURDLE: a newly proposed factor with |t| <= hurdle_t (Harvey, Liu & Zhu 2016)."""
    if not is_new_factor or not _finite(t_stat):
        return None
    if sig.clears_hurdle(t_stat, th.hurdle_t):
        return None
    return _fire("HURDLE", t_stat, th.hurdle_t)


def tracked_set_adjusted_p(p_values, th: WarningThresholds) -> np.ndarray:
    """Adjusted p-values of the tracked set, shape (m,), with the configured method."""
    return sig.adjusted_p_values(p_values, th.multiple_testing_method)


def tracked_set_significance_warnings(
    th: WarningThresholds,
    t_stats=None,
    p_values=None,
    is_new_factor=None,
) -> list[list[Warning]]:
    """FDR and HURDLE warnings for every factor in the tracked set.

    Parameters
    ----------
    th : WarningThresholds
    t_stats : array_like, shape (m,), optional
        Per-factor t-stats; p-values are then two-sided normal.
    p_values : array_like, shape (m,), optional
        Per-factor p-values, used when ``t_stats`` is not given (the hurdle
        then uses |t| = Phi^{-1}(1 - p/2)).
    is_new_factor : array_like of bool, shape (m,), optional
        Which factors are newly proposed; default none.

    Returns
    -------
    list of list of Warning
        One list per factor, in input order.
    """
    if t_stats is not None:
        t = np.asarray(t_stats, dtype=float).ravel()
        p = np.asarray(sig.two_sided_p_value(t), dtype=float).ravel()
    elif p_values is not None:
        p = np.asarray(p_values, dtype=float).ravel()
        t = stats.norm.isf(p / 2.0)
    else:
        raise ValueError("give t_stats or p_values")
    new = (np.zeros(p.shape, dtype=bool) if is_new_factor is None
           else np.asarray(is_new_factor, dtype=bool).ravel())
    p_adj = tracked_set_adjusted_p(p, th)
    out = []
    for i in range(p.size):
        found = [rule_multiple_testing(p[i], p_adj[i], th),
                 rule_hurdle(t[i], bool(new[i]), th)]
        out.append([w for w in found if w is not None])
    return out


def rule_fragile(premium, premium_sd, th: WarningThresholds, premium_drop_last=None,
                 premium_q_half=None, premium_q_double=None) -> Warning | None:
    """FRAGILE: a re-estimate moves the premium by more than k of its sds.

    The caller computes the alternative premia: without the last
    ``th.fragile_drop_last`` rows, and with q halved / doubled. Any of them
    may be None.
    """
    if not (_finite(premium) and _finite(premium_sd)) or premium_sd <= 0:
        return None
    checks = {
        f"the last {th.fragile_drop_last} rows are dropped": premium_drop_last,
        "the premium's drift variance q is halved": premium_q_half,
        "the premium's drift variance q is doubled": premium_q_double,
    }
    shifts = {k: abs(v - premium) / premium_sd for k, v in checks.items() if _finite(v)}
    if not shifts:
        return None
    which = max(shifts, key=shifts.get)
    if shifts[which] > th.fragile_sd_multiple:
        return _fire("FRAGILE", shifts[which], th.fragile_sd_multiple, which=which)
    return None


def rule_hindsight_gap(filtered, smoothed, filtered_sd, th: WarningThresholds
                       ) -> Warning | None:
    """HINDSIGHT_GAP: max_t |mu_{t|T} - mu_{t|t}| / sd_{t|t} above the threshold.

    Parameters
    ----------
    filtered, smoothed, filtered_sd : array_like, shape (T,)
        Filtered premium path, smoothed path, filtered sd path.
    """
    if filtered is None or smoothed is None or filtered_sd is None:
        return None
    f, s, sd = (np.asarray(a, dtype=float).ravel() for a in (filtered, smoothed, filtered_sd))
    with np.errstate(divide="ignore", invalid="ignore"):
        gap = np.abs(s - f) / sd
    usable = np.isfinite(gap) & (sd > 0)
    if not usable.any():
        return None
    # the first largest usable gap (argmax over -inf elsewhere: nanargmax's pick, without
    # its copies; a daily update calls this for every factor)
    i = int(np.argmax(np.where(usable, gap, -np.inf)))
    if gap[i] > th.hindsight_gap_sd:
        return _fire("HINDSIGHT_GAP", gap[i], th.hindsight_gap_sd, ago=f.size - 1 - i)
    return None


def rule_implausible_sharpe(sharpe_annual, history_years, th: WarningThresholds
                            ) -> Warning | None:
    """IMPLAUSIBLE_SR: |annual SR| > limit on at least ``implausible_min_years``."""
    if not (_finite(sharpe_annual) and _finite(history_years)):
        return None
    if history_years >= th.implausible_min_years and abs(sharpe_annual) > th.implausible_sharpe:
        return _fire("IMPLAUSIBLE_SR", sharpe_annual, th.implausible_sharpe,
                     years=round(history_years, 1), min_years=th.implausible_min_years)
    return None


# --------------------------------------------------------------------------- #
# Regimes
# --------------------------------------------------------------------------- #


def _latest_probs(probs) -> np.ndarray | None:
    if probs is None:
        return None
    p = np.asarray(probs, dtype=float)
    if p.size == 0:
        return None
    return p[-1] if p.ndim == 2 else p.ravel()


def rule_regime_ambiguous(regime_probabilities, th: WarningThresholds) -> Warning | None:
    """REGIME_AMBIG: max_i P(S_t = i | data to t) below the threshold.

    Parameters
    ----------
    regime_probabilities : array_like, shape (K,) or (T, K)
        Filtered probabilities; with a 2-D array the last row is used.
    """
    p = _latest_probs(regime_probabilities)
    if p is None or not np.isfinite(p).all():
        return None
    top = float(p.max())
    if top < th.regime_ambiguous_prob:
        return _fire("REGIME_AMBIG", top, th.regime_ambiguous_prob)
    return None


def rule_regime_flip(regime_probabilities, th: WarningThresholds,
                     labels: Sequence[str] | None = None) -> Warning | None:
    """REGIME_FLIP: argmax of the filtered probabilities changed recently.

    Parameters
    ----------
    regime_probabilities : array_like, shape (T, K)
        Filtered probabilities, oldest row first.
    labels : sequence of str, optional
        Names of the K regimes for the detail text; default 'regime i'.
    """
    if regime_probabilities is None:
        return None
    p = np.asarray(regime_probabilities, dtype=float)
    if p.ndim != 2 or p.shape[0] < 2:
        return None
    p = p[np.isfinite(p).all(axis=1)]
    if p.shape[0] < 2:
        return None
    top = p.argmax(axis=1)
    changes = np.flatnonzero(top[1:] != top[:-1]) + 1
    if changes.size == 0:
        return None
    last = int(changes[-1])
    ago = p.shape[0] - 1 - last
    if ago < th.regime_flip_periods:
        name = (lambda i: labels[i]) if labels is not None else (lambda i: f"regime {i}")
        return _fire("REGIME_FLIP", ago, th.regime_flip_periods,
                     old=name(int(top[last - 1])), new=name(int(top[last])))
    return None


def rule_regime_unfit(status: str | None, message: str | None = None) -> Warning | None:
    """REGIME_UNFIT: the regime fit status is not 'ok' (e.g. 'unidentified')."""
    if not _status_failed(status):
        return None
    return _fire("REGIME_UNFIT", math.nan, math.nan, status=status,
                 status_message=message or "no further detail")


# --------------------------------------------------------------------------- #
# Model misfit
# --------------------------------------------------------------------------- #


def rule_misfit_normal(diag: sig.ResidualDiagnostics | None, th: WarningThresholds
                       ) -> Warning | None:
    """MISFIT_NORMAL: Jarque-Bera p-value below ``misfit_p_value``."""
    if diag is None or diag.status != "ok" or not _finite(diag.jb_p_value):
        return None
    if diag.jb_p_value < th.misfit_p_value:
        return _fire("MISFIT_NORMAL", diag.jb_p_value, th.misfit_p_value,
                     n_obs=diag.n_obs, skewness=diag.skewness, kurtosis=diag.kurtosis)
    return None


def rule_misfit_serial(diag: sig.ResidualDiagnostics | None, th: WarningThresholds
                       ) -> Warning | None:
    """MISFIT_SERIAL: Ljung-Box p-value below ``misfit_p_value``."""
    if diag is None or diag.status != "ok" or not _finite(diag.lb_p_value):
        return None
    if diag.lb_p_value < th.misfit_p_value:
        return _fire("MISFIT_SERIAL", diag.lb_p_value, th.misfit_p_value,
                     n_obs=diag.n_obs, lags=diag.lags)
    return None


def misfit_diagnostics(standardized_errors, th: WarningThresholds
                       ) -> sig.ResidualDiagnostics | None:
    """JB and Ljung-Box on the latest ``misfit_window`` standardized errors."""
    if standardized_errors is None:
        return None
    e = np.asarray(standardized_errors, dtype=float).ravel()
    e = e[np.isfinite(e)]
    if th.misfit_window > 0:
        e = e[-th.misfit_window:]
    lags = min(th.ljung_box_lags, e.size // 5)
    return sig.residual_diagnostics(e, lags=lags)


@dataclass(frozen=True)
class DriftStatistic:
    """Recent mean predictive log-likelihood against its earlier norm.

    z = (lbar_recent - lbar_base) / sqrt(LRV_base (1/w + 1/n_base)),

    where LRV_base is the Bartlett (Newey-West) long-run variance of the
    baseline log-likelihoods, so volatility clustering in the errors does not
    make z look more extreme than it is. Under a stable model z is about N(0, 1);
    a model that has started to misforecast gives a large negative z.

    Attributes
    ----------
    status : {'ok', 'too_little_data'}
    message : str
    z : float
    recent_mean, baseline_mean : float
    baseline_long_run_sd : float
        sqrt(LRV_base).
    n_recent, n_baseline : int
    """

    status: str
    message: str
    z: float
    recent_mean: float
    baseline_mean: float
    baseline_long_run_sd: float
    n_recent: int
    n_baseline: int


def predictive_loglik_drift(loglik, window: int = 21, baseline: int | None = None
                            ) -> DriftStatistic:
    """Drift statistic of one-step predictive log-likelihoods.

    Parameters
    ----------
    loglik : array_like, shape (T,)
        log p(y_t | y_{1..t-1}) per row, oldest first; non-finite dropped.
    window : int, default 21
        w, the recent rows.
    baseline : int, optional
        Use only this many rows before the window as the norm (default all).
        The baseline needs at least max(2 w, 30) rows.
    """
    x = np.asarray(loglik, dtype=float).ravel()
    x = x[np.isfinite(x)]
    w = int(window)
    base = x[:-w] if w > 0 else x
    if baseline is not None:
        base = base[-int(baseline):]
    need = max(2 * w, 30)
    if w < 1 or base.size < need:
        nan = math.nan
        return DriftStatistic("too_little_data",
                              f"need a window of at least 1 and {need} baseline rows; "
                              f"have {base.size}", nan, nan, nan, nan, max(w, 0), base.size)
    recent = x[-w:]
    lrv = sig.long_run_variance(base)
    rm, bm = float(recent.mean()), float(base.mean())
    if not lrv > 0:
        return DriftStatistic("too_little_data", "baseline log-likelihood is constant",
                              math.nan, rm, bm, 0.0, w, base.size)
    z = (rm - bm) / math.sqrt(lrv * (1.0 / w + 1.0 / base.size))
    return DriftStatistic("ok", "", z, rm, bm, math.sqrt(lrv), w, base.size)


def rule_drift(drift: DriftStatistic | None, th: WarningThresholds) -> Warning | None:
    """DRIFT: drift statistic z below -drift_z."""
    if drift is None or drift.status != "ok" or not _finite(drift.z):
        return None
    if drift.z < -th.drift_z:
        return _fire("DRIFT", drift.z, -th.drift_z, window=drift.n_recent)
    return None


def rule_fit_failed(status: str | None, message: str | None = None) -> Warning | None:
    """FIT_FAILED: the premium model's status is not 'ok'."""
    if not _status_failed(status):
        return None
    return _fire("FIT_FAILED", math.nan, math.nan, status=status,
                 status_message=message or "no further detail")


# --------------------------------------------------------------------------- #
# Data quality
# --------------------------------------------------------------------------- #


def rule_stale(last_date, latest_date_in_set, frequency: str, th: WarningThresholds,
               holidays=None) -> Warning | None:
    """STALE: this series is behind the latest date of the tracked set.

    Parameters
    ----------
    last_date : date-like
        Last row of this series.
    latest_date_in_set : date-like
        Latest row among the other series of the same frequency.
    frequency : {'daily', 'weekly', 'monthly', 'quarterly', 'annual'}
        'daily' counts business days (Mon-Fri minus ``holidays``).
    """
    if last_date is None or latest_date_in_set is None or frequency is None:
        return None
    last = np.datetime64(last_date, "D")
    latest = np.datetime64(latest_date_in_set, "D")
    if latest <= last:
        return None
    if frequency == "daily":
        behind = int(np.busday_count(last + 1, latest + 1, holidays=_holidays(holidays)))
        limit, unit = th.stale_business_days, "business days"
    else:
        idx = _period_index(np.array([last, latest]), frequency)
        behind = int(idx[1] - idx[0])
        limit, unit = th.stale_periods, "periods"
    if behind >= limit and behind > 0:
        return _fire("STALE", behind, limit, unit=unit, last_date=str(last),
                     set_date=str(latest))
    return None


def rule_gap(dates, frequency: str, th: WarningThresholds, holidays=None) -> Warning | None:
    """GAP: missing rows inside the series (not before the first or after the last).

    Parameters
    ----------
    dates : array_like of date-like, shape (T,)
    frequency : {'daily', 'weekly', 'monthly', 'quarterly', 'annual'}
    holidays : array_like of date-like, optional
        Days that are not business days (daily series only).
    """
    if dates is None or frequency is None:
        return None
    d = _as_days(dates)
    if d.size < 2:
        return None
    if frequency == "daily":
        missing = np.busday_count(d[:-1] + 1, d[1:], holidays=_holidays(holidays))
        limit, unit = th.gap_business_days, "business days"
    else:
        missing = np.diff(_period_index(d, frequency)) - 1
        limit, unit = th.gap_periods, "periods"
    i = int(np.argmax(missing))
    longest = int(missing[i])
    if longest >= limit and longest > 0:
        return _fire("GAP", longest, limit, unit=unit, gap_start=str(d[i]),
                     total=int(missing[missing > 0].sum()))
    return None


def rule_outlier(standardized_errors, th: WarningThresholds) -> Warning | None:
    """OUTLIER: |v_t / sqrt(F_t)| > outlier_sd among the latest ``outlier_lookback`` rows."""
    if standardized_errors is None:
        return None
    e = np.asarray(standardized_errors, dtype=float).ravel()
    e = e[np.isfinite(e)][-max(th.outlier_lookback, 1):]
    if e.size == 0:
        return None
    big = np.abs(e)
    if big.max() > th.outlier_sd:
        return _fire("OUTLIER", big.max(), th.outlier_sd,
                     count=int((big > th.outlier_sd).sum()), lookback=e.size)
    return None


def rule_revised(revision_count, th: WarningThresholds) -> Warning | None:
    """REVISED: at least ``revisions_min`` past values were changed."""
    if revision_count is None or revision_count <= 0:
        return None
    if revision_count >= th.revisions_min:
        return _fire("REVISED", revision_count, th.revisions_min)
    return None


def longest_run(values) -> tuple[int, int, float]:
    """Longest run of identical consecutive finite values.

    Returns
    -------
    (length, end_index, value) : tuple
        Length 0 when there is no finite value; a NaN breaks a run.
    """
    v = np.asarray(values, dtype=float).ravel()
    if v.size == 0:
        return 0, -1, math.nan
    same = (v[1:] == v[:-1])  # NaN != NaN, so gaps break runs
    # run length ending at each row, by cumulative counting reset at breaks
    idx = np.arange(1, v.size)
    breaks = np.where(~same, idx, 0)
    last_break = np.maximum.accumulate(np.concatenate([[0], breaks]))
    run = np.arange(v.size) - last_break + 1
    run[~np.isfinite(v)] = 0
    end = int(np.argmax(run))
    return int(run[end]), end, float(v[end])


def rule_repeated(values, th: WarningThresholds) -> Warning | None:
    """REPEATED: a value (zeros included) repeats ``repeated_run_length`` times in a row."""
    if values is None:
        return None
    length, end, value = longest_run(values)
    if length >= th.repeated_run_length and length > 1:
        return _fire("REPEATED", length, th.repeated_run_length, repeated=value, end=end)
    return None


def rule_freq_mismatch(dates, frequency: str, th: WarningThresholds) -> Warning | None:
    """FREQ_MISMATCH: median calendar-day spacing far from the declared frequency's."""
    if dates is None or frequency is None:
        return None
    d = _as_days(dates)
    if d.size < 3:
        return None
    expected = FREQUENCY_DAYS[frequency]
    median = float(np.median(np.diff(d).astype(np.int64)))
    ratio = median / expected
    if ratio > th.freq_mismatch_ratio or ratio < 1.0 / th.freq_mismatch_ratio:
        return _fire("FREQ_MISMATCH", median, th.freq_mismatch_ratio,
                     expected=expected, frequency=frequency)
    return None


# --------------------------------------------------------------------------- #
# Everything for one factor at one date
# --------------------------------------------------------------------------- #


@dataclass(frozen=True, eq=False)
class FactorWarningInputs:
    """Everything the rules need for one factor at one date; None = not available.

    Per-period quantities are at the series' own frequency.

    Attributes
    ----------
    premium : float
        Filtered premium mu_{t|t} (per period).
    premium_sd : float
        Its filtered standard deviation sqrt(P_{t|t}).
    volatility : float
        Forecast sd of the factor return, sqrt(c h_{t+1}), per period (NOISE text).
    periods_per_year : float
        q; if None, taken from ``frequency`` (252 daily, 12 monthly, ...).
    t_stat : float
        The factor's t-stat (e.g. Newey-West t of the mean return) for HURDLE.
    p_value : float
        Its raw two-sided p-value (FDR).
    p_value_adjusted : float
        Its adjusted p-value across the tracked set, from
        :func:`tracked_set_adjusted_p` with the same thresholds (FDR).
    is_new_factor : bool
        Newly proposed factor, held to the HURDLE.
    premium_drop_last : float
        Premium re-estimated without the last ``fragile_drop_last`` rows (FRAGILE).
    premium_q_half, premium_q_double : float
        Premium re-filtered with q halved / doubled (FRAGILE).
    filtered_path, smoothed_path, filtered_sd_path : ndarray, shape (T,)
        mu_{t|t}, mu_{t|T}, sqrt(P_{t|t}) over the history (HINDSIGHT_GAP).
    sharpe_annual : float
        Sample annual Sharpe ratio of the whole history (IMPLAUSIBLE_SR).
    history_years : float
        Length of that history in years (IMPLAUSIBLE_SR).
    regime_probabilities : ndarray, shape (T, K)
        Filtered regime probabilities, oldest first (REGIME_AMBIG uses the
        last row, REGIME_FLIP the whole array).
    regime_labels : tuple of str, length K
        Regime names for the detail text.
    regime_status, regime_message : str
        Status and message of the regime fit (REGIME_UNFIT).
    standardized_errors : ndarray, shape (T,)
        One-step errors v_t / sqrt(F_t), oldest first (MISFIT_*, OUTLIER).
    predictive_loglik : ndarray, shape (T,)
        One-step predictive log-likelihoods, oldest first (DRIFT).
    fit_status, fit_message : str
        Status and message of the premium model (FIT_FAILED).
    frequency : str
        Declared frequency: 'daily', 'weekly', 'monthly', 'quarterly', 'annual'.
    dates : ndarray of datetime64[D], shape (T,)
        Dates of the stored rows (GAP, FREQ_MISMATCH, STALE uses the last).
    values : ndarray, shape (T,)
        The stored values in date order (REPEATED).
    latest_date_in_set : datetime64[D]
        Latest date among the tracked series of the same frequency (STALE).
    holidays : ndarray of datetime64[D]
        Non-business days for daily series (STALE, GAP).
    revision_count : int
        Number of past values changed by the latest delivery (REVISED).
    """

    premium: float | None = None
    premium_sd: float | None = None
    volatility: float | None = None
    periods_per_year: float | None = None
    t_stat: float | None = None
    p_value: float | None = None
    p_value_adjusted: float | None = None
    is_new_factor: bool | None = None
    premium_drop_last: float | None = None
    premium_q_half: float | None = None
    premium_q_double: float | None = None
    filtered_path: np.ndarray | None = None
    smoothed_path: np.ndarray | None = None
    filtered_sd_path: np.ndarray | None = None
    sharpe_annual: float | None = None
    history_years: float | None = None
    regime_probabilities: np.ndarray | None = None
    regime_labels: tuple[str, ...] | None = None
    regime_status: str | None = None
    regime_message: str | None = None
    standardized_errors: np.ndarray | None = None
    predictive_loglik: np.ndarray | None = None
    fit_status: str | None = None
    fit_message: str | None = None
    frequency: str | None = None
    dates: np.ndarray | None = None
    values: np.ndarray | None = None
    latest_date_in_set: np.datetime64 | None = None
    holidays: np.ndarray | None = None
    revision_count: int | None = None

    def __post_init__(self):
        if self.frequency is not None and self.frequency not in FREQUENCY_DAYS:
            raise ValueError(f"unknown frequency {self.frequency!r}; use one of "
                             f"{sorted(FREQUENCY_DAYS)}")


def evaluate_all(inputs: FactorWarningInputs,
                 thresholds: WarningThresholds | None = None) -> list[Warning]:
    """Run every rule for one factor at one date; warnings in catalogue order."""
    th = thresholds or WarningThresholds()
    x = inputs
    q = x.periods_per_year
    if q is None and x.frequency is not None:
        q = sig.PERIODS_PER_YEAR.get(x.frequency)
    diag = misfit_diagnostics(x.standardized_errors, th)
    drift = (None if x.predictive_loglik is None
             else predictive_loglik_drift(x.predictive_loglik, th.drift_window))
    last_date = None
    if x.dates is not None and len(x.dates) > 0:
        last_date = _as_days(x.dates)[-1]
    found = [
        rule_noise(x.premium, x.premium_sd, th, x.volatility, q),
        rule_multiple_testing(x.p_value, x.p_value_adjusted, th),
        rule_hurdle(x.t_stat, x.is_new_factor, th),
        rule_fragile(x.premium, x.premium_sd, th, x.premium_drop_last,
                     x.premium_q_half, x.premium_q_double),
        rule_hindsight_gap(x.filtered_path, x.smoothed_path, x.filtered_sd_path, th),
        rule_implausible_sharpe(x.sharpe_annual, x.history_years, th),
        rule_regime_ambiguous(x.regime_probabilities, th),
        rule_regime_flip(x.regime_probabilities, th, x.regime_labels),
        rule_regime_unfit(x.regime_status, x.regime_message),
        rule_misfit_normal(diag, th),
        rule_misfit_serial(diag, th),
        rule_drift(drift, th),
        rule_fit_failed(x.fit_status, x.fit_message),
        rule_stale(last_date, x.latest_date_in_set, x.frequency, th, x.holidays),
        rule_gap(x.dates, x.frequency, th, x.holidays),
        rule_outlier(x.standardized_errors, th),
        rule_revised(x.revision_count, th),
        rule_repeated(x.values, th),
        rule_freq_mismatch(x.dates, x.frequency, th),
    ]
    return [w for w in found if w is not None]
