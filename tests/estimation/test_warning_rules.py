"""Tests of tracker.estimation.warning_rules.

Design: one fully clean factor fires nothing; each code then gets a single
change to that clean factor which must fire that code (and, unless listed,
nothing else), and a change of its threshold that must silence it again.
"""

import dataclasses
import math
import re

import numpy as np
import pytest
from scipy import stats

from tracker.estimation import significance as sig
from tracker.estimation import warning_rules as wr
from tracker.estimation.warning_rules import FactorWarningInputs, WarningThresholds

RNG_SEED = 2024


def business_days(start, end):
    d = np.arange(np.datetime64(start), np.datetime64(end) + 1)
    return d[np.is_busday(d)]


def clean_inputs() -> dict:
    """A factor at one date for which no rule should fire."""
    rng = np.random.default_rng(RNG_SEED)
    dates = business_days("2023-01-02", "2024-03-01")
    errors = rng.standard_normal(dates.size)
    filtered = np.linspace(0.0, 0.001, 60)
    return dict(
        premium=3.0, premium_sd=1.0, volatility=10.0, frequency="daily",
        t_stat=3.5, p_value=0.0005, p_value_adjusted=0.002, is_new_factor=True,
        premium_drop_last=3.1, premium_q_half=2.9, premium_q_double=3.2,
        filtered_path=filtered, smoothed_path=filtered + 0.00005,
        filtered_sd_path=np.full(60, 0.0001),
        sharpe_annual=0.5, history_years=30.0,
        regime_probabilities=np.tile([0.9, 0.1], (60, 1)), regime_labels=("calm", "stormy"),
        regime_status="ok", fit_status="ok",
        standardized_errors=errors, predictive_loglik=stats.norm.logpdf(errors),
        dates=dates, values=0.01 * rng.standard_normal(dates.size),
        latest_date_in_set=dates[-1], revision_count=0,
    )


def _flip_probs():
    p = np.tile([0.9, 0.1], (60, 1))
    p[-3:] = [0.2, 0.8]  # most likely regime changed 2 rows before the latest
    return p


def _with_last(values, last):
    out = np.array(values, dtype=float)
    out[-1] = last
    return out


def _drift_loglik():
    rng = np.random.default_rng(7)
    e = rng.standard_normal(300)
    e[-21:] *= 3.0  # the model's variance is now far too small
    return stats.norm.logpdf(e)


def _gappy_dates(n_missing):
    d = business_days("2023-01-02", "2024-03-01")
    return np.delete(d, np.arange(100, 100 + n_missing))


def _repeated_values(run):
    rng = np.random.default_rng(8)
    v = 0.01 * rng.standard_normal(business_days("2023-01-02", "2024-03-01").size)
    v[50:50 + run] = 0.0  # e.g. a vendor filling holidays with zeros
    return v


def _fire_cases():
    """code -> (changes to the clean inputs, relaxed thresholds that silence it)."""
    rng = np.random.default_rng(RNG_SEED + 1)
    n = business_days("2023-01-02", "2024-03-01").size
    spike = np.zeros(60)
    spike[10] = 0.0005  # 5 filtered sds in hindsight
    ar = np.empty(n)
    ar[0] = 0.0
    shocks = rng.standard_normal(n)
    for t in range(1, n):
        ar[t] = 0.6 * ar[t - 1] + shocks[t]
    return {
        "NOISE": (dict(premium=0.9, premium_drop_last=1.0, premium_q_half=0.8,
                       premium_q_double=1.1), dict(noise_sd_multiple=0.5, noise_band_level=0.5)),
        "FDR": (dict(p_value=0.03, p_value_adjusted=0.09), dict(significance_level=0.1)),
        "HURDLE": (dict(t_stat=2.5, p_value=0.012, p_value_adjusted=0.03),
                   dict(hurdle_t=2.0)),
        "FRAGILE": (dict(premium_drop_last=4.5), dict(fragile_sd_multiple=2.0)),
        "HINDSIGHT_GAP": (dict(filtered_path=np.zeros(60), smoothed_path=spike),
                          dict(hindsight_gap_sd=6.0)),
        "IMPLAUSIBLE_SR": (dict(sharpe_annual=2.0), dict(implausible_sharpe=2.5)),
        "REGIME_AMBIG": (dict(regime_probabilities=np.tile([0.55, 0.45], (60, 1))),
                         dict(regime_ambiguous_prob=0.5)),
        "REGIME_FLIP": (dict(regime_probabilities=_flip_probs()),
                        dict(regime_flip_periods=2)),
        "REGIME_UNFIT": (dict(regime_status="unidentified",
                              regime_message="two regimes have the same variance"), None),
        "MISFIT_NORMAL": (dict(standardized_errors=rng.standard_t(3, n) / math.sqrt(3)),
                          dict(misfit_p_value=0.0)),
        "MISFIT_SERIAL": (dict(standardized_errors=ar * math.sqrt(1 - 0.36)),
                          dict(misfit_p_value=0.0)),
        "DRIFT": (dict(predictive_loglik=_drift_loglik()), dict(drift_z=100.0)),
        "FIT_FAILED": (dict(fit_status="not_converged", fit_message="optimizer stopped"),
                       None),
        "STALE": (dict(latest_date_in_set=np.datetime64("2024-03-07")),
                  dict(stale_business_days=5)),
        "GAP": (dict(dates=_gappy_dates(4), latest_date_in_set=np.datetime64("2024-03-01")),
                dict(gap_business_days=5)),
        "OUTLIER": (dict(standardized_errors=_with_last(
            np.random.default_rng(RNG_SEED).standard_normal(n), 9.0)),
            dict(outlier_sd=10.0)),
        "REVISED": (dict(revision_count=2), dict(revisions_min=3)),
        "REPEATED": (dict(values=_repeated_values(6)), dict(repeated_run_length=7)),
        "FREQ_MISMATCH": (dict(frequency="monthly", latest_date_in_set=None),
                          dict(freq_mismatch_ratio=40.0)),
    }


FIRE_CASES = _fire_cases()

#: Codes that rightly fire together with the constructed one: a 9-sd error in
#: ~300 otherwise normal errors also rejects normality.
ALSO_FIRES = {"OUTLIER": {"MISFIT_NORMAL"}}


def codes(warnings):
    return [w.code for w in warnings]


def test_every_code_has_a_fire_case():
    assert set(FIRE_CASES) == set(wr.CATALOGUE)


def test_clean_factor_fires_nothing():
    assert wr.evaluate_all(FactorWarningInputs(**clean_inputs())) == []


def test_no_inputs_fire_nothing():
    assert wr.evaluate_all(FactorWarningInputs()) == []


@pytest.mark.parametrize("code", list(FIRE_CASES))
def test_code_quiet_on_clean_case(code):
    assert code not in codes(wr.evaluate_all(FactorWarningInputs(**clean_inputs())))


@pytest.mark.parametrize("code", list(FIRE_CASES))
def test_code_fires_on_constructed_case(code):
    changes, _ = FIRE_CASES[code]
    found = wr.evaluate_all(FactorWarningInputs(**{**clean_inputs(), **changes}))
    assert set(codes(found)) == {code} | ALSO_FIRES.get(code, set())
    w = next(w for w in found if w.code == code)
    spec = wr.CATALOGUE[code]
    assert (w.severity, w.message, w.source) == (spec.severity, spec.message, spec.source)
    if spec.threshold_key is not None:
        # the detail states the triggering number and the limit it crossed
        assert wr.format_number(w.value) in w.detail
        assert wr.format_number(w.threshold) in w.detail


@pytest.mark.parametrize("code", [c for c, (_, r) in FIRE_CASES.items() if r is not None])
def test_threshold_changes_behaviour(code):
    changes, relaxed = FIRE_CASES[code]
    inputs = FactorWarningInputs(**{**clean_inputs(), **changes})
    assert code in codes(wr.evaluate_all(inputs, WarningThresholds()))
    assert code not in codes(wr.evaluate_all(inputs, WarningThresholds(**relaxed)))
    for key in relaxed:
        spec = wr.CATALOGUE[code]
        assert key == spec.threshold_key or key in spec.other_keys


# --------------------------------------------------------------------------- #
# Catalogue and thresholds
# --------------------------------------------------------------------------- #


def test_catalogue_entries_are_complete_and_unique():
    all_codes = [s.code for s in wr._SPECS]
    assert len(all_codes) == len(set(all_codes)) == len(wr.CATALOGUE)
    keys = {f.name for f in dataclasses.fields(WarningThresholds)}
    for code, spec in wr.CATALOGUE.items():
        assert re.fullmatch(r"[A-Z][A-Z_]*", code)
        assert spec.code == code and spec.severity in wr.SEVERITIES
        assert spec.message.strip() and spec.source.strip() and spec.detail_template.strip()
        assert "\n" not in spec.message
        assert spec.threshold_key is None or spec.threshold_key in keys
        assert set(spec.other_keys) <= keys
        if spec.threshold_key is not None:
            assert "{value}" in spec.detail_template and "{threshold}" in spec.detail_template


def test_every_threshold_key_is_used_by_some_code():
    used = set()
    for spec in wr.CATALOGUE.values():
        used |= {spec.threshold_key, *spec.other_keys}
    assert {f.name for f in dataclasses.fields(WarningThresholds)} <= used


def test_threshold_defaults_from_the_literature_and_design_notes():
    th = WarningThresholds()
    assert th.hurdle_t == 3.0  # Harvey, Liu & Zhu (2016)
    assert th.implausible_sharpe == 1.5  # DESIGN.md, common practice
    assert th.outlier_sd == 8.0  # DESIGN.md, common practice
    assert th.regime_ambiguous_prob == 0.6 and th.noise_band_level == 0.9


def test_thresholds_round_trip_and_reject_bad_config():
    th = WarningThresholds(outlier_sd=6.0, multiple_testing_method="holm")
    assert WarningThresholds.from_dict(th.to_dict()) == th
    assert WarningThresholds.from_dict({"drift_z": 2.5}).drift_z == 2.5
    with pytest.raises(ValueError, match="unknown"):
        WarningThresholds.from_dict({"outlier_sigma": 6.0})
    with pytest.raises(ValueError):
        WarningThresholds(significance_level=1.5)
    with pytest.raises(ValueError):
        WarningThresholds(multiple_testing_method="bonferroni")
    with pytest.raises(ValueError):
        WarningThresholds(outlier_sd=-1.0)
    with pytest.raises(ValueError):
        FactorWarningInputs(frequency="hourly")


def test_warning_to_dict():
    w = wr.rule_revised(3, WarningThresholds())
    assert w.to_dict() == dict(code="REVISED", severity="caution", message=w.message,
                               detail=w.detail, value=3.0, threshold=1.0, source=w.source)


# --------------------------------------------------------------------------- #
# Individual rules: edges and the parts the table does not reach
# --------------------------------------------------------------------------- #


def test_noise_band_and_sd_parts():
    th = WarningThresholds()
    # 1.3 sds: outside 1 sd, but the 90% band (+-1.645 sd) still contains zero
    assert wr.rule_noise(1.3, 1.0, th) is not None
    assert wr.rule_noise(1.3, 1.0, WarningThresholds(noise_band_level=0.0)) is None
    assert wr.rule_noise(0.9, 1.0, WarningThresholds(noise_band_level=0.0)) is not None
    assert wr.rule_noise(-2.0, 1.0, th) is None  # sign does not matter
    assert wr.rule_noise(1.0, None, th) is None


def test_noise_detail_states_years_needed():
    # SR = 0.3 a year -> (2 / 0.3)^2 = 44 years (DESIGN.md).
    vol = 1.0
    premium = 0.3 / math.sqrt(12) * vol
    w = wr.rule_noise(premium, 0.1, WarningThresholds(), volatility=vol, periods_per_year=12)
    assert "about 44 years" in w.detail
    # a Sharpe ratio of 17 (early in a history, the premium still uncertain): (2/17)^2
    # rounds to 0 years, said as under a year
    big = 17.0 / math.sqrt(12) * vol
    w = wr.rule_noise(big, big, WarningThresholds(), volatility=vol, periods_per_year=12)
    assert "needs under a year of data" in w.detail and "about 0 years" not in w.detail
    assert wr.rule_noise_many([big], [big], WarningThresholds(), [vol], 12)[0] == w


@pytest.mark.parametrize("th", [WarningThresholds(), WarningThresholds(noise_band_level=0.5, noise_sd_multiple=1.5)])
def test_noise_for_many_rows_equals_the_rule_row_by_row(th):
    # the vectorised NOISE (refits flag most dates) against rule_noise on every row:
    # same rows, same text, same numbers; edge rows: NaN, zero sd, zero premium, no vol
    rng = np.random.default_rng(RNG_SEED)
    n = 3000
    mu = rng.normal(0, 1e-4, n)
    sd = np.abs(rng.normal(1e-4, 5e-5, n))
    vol = np.abs(rng.normal(0.01, 0.003, n))
    mu[:4], sd[4:8], vol[8:12] = np.nan, [0.0, np.nan, -1.0, np.inf], [np.nan, 0.0, -0.01, np.inf]
    mu[12:16] = 0.0
    for ppy in (252, 12, None):
        want = {i: w for i in range(n)
                if (w := wr.rule_noise(mu[i], sd[i], th, vol[i], ppy)) is not None}
        got = wr.rule_noise_many(mu, sd, th, vol, ppy)
        assert 0 < len(want) < n
        assert list(got) == list(want)
        assert all(got[i] == want[i] for i in want)
    assert wr.rule_noise_many(mu, sd, th) == {i: w for i in range(n)
                                              if (w := wr.rule_noise(mu[i], sd[i], th)) is not None}



def test_format_numbers_equals_format_number_value_by_value():
    # the vectorised formatter of the refit's NOISE rows against format_number on each
    # value: whole numbers written out below 1e6, 3 significant digits otherwise, n/a, inf
    rng = np.random.default_rng(RNG_SEED)
    edge = [0.0, -0.0, 1.0, -3.0, 999.0, 1000.0, 123456.0, 999999.0, 1e6, 1e6 + 1, 2.0**53,
            0.5, 1.5, 2.5, -0.0004999, 9.995, 99.95, 1e-300, 5e-324, 1e300, np.nan, np.inf,
            -np.inf, 0.1, 1 / 3, 1234.5]
    values = np.concatenate([edge, rng.normal(0, 3, 2000), np.round(rng.normal(0, 1e4, 500)),
                             10.0 ** rng.uniform(-8, 12, 500)])
    assert wr.format_numbers(values) == [wr.format_number(v) for v in values]
    assert wr.format_numbers([]) == []

def test_fdr_rule_boundaries():
    th = WarningThresholds()
    assert wr.rule_multiple_testing(0.05, 0.051, th) is not None
    assert wr.rule_multiple_testing(0.051, 0.2, th) is None  # not significant alone
    assert wr.rule_multiple_testing(0.01, 0.05, th) is None  # survives adjustment
    assert wr.rule_multiple_testing(0.01, None, th) is None


def test_tracked_set_significance_matches_multiple_testing_module():
    # Reference: the statsmodels-backed adjust_p_values; the set-level rule must
    # flag exactly the factors it reports as lost after BY, and hold only the new
    # factors to the Harvey-Liu-Zhu hurdle.
    t = np.array([4.0, 2.3, 2.1, 0.4, 2.6, 3.4])
    new = np.array([False, False, True, True, True, True])
    out = wr.tracked_set_significance_warnings(WarningThresholds(), t_stats=t,
                                               is_new_factor=new)
    lost = sig.adjust_p_values(sig.two_sided_p_value(t), 0.05).lost_by
    assert [("FDR" in codes(ws)) for ws in out] == list(lost)
    assert [("HURDLE" in codes(ws)) for ws in out] == [False, False, True, True, True, False]
    assert lost[1] and not lost[0]  # the case is not degenerate
    via_p = wr.tracked_set_significance_warnings(
        WarningThresholds(), p_values=sig.two_sided_p_value(t), is_new_factor=new)
    assert [codes(a) for a in via_p] == [codes(b) for b in out]
    holm = wr.tracked_set_significance_warnings(
        WarningThresholds(multiple_testing_method="holm"), t_stats=t)
    assert [("FDR" in codes(ws)) for ws in holm] == list(
        sig.adjust_p_values(sig.two_sided_p_value(t)).lost_holm)


def test_fragile_reports_largest_shift():
    th = WarningThresholds()
    w = wr.rule_fragile(1.0, 0.1, th, premium_drop_last=1.05, premium_q_half=0.8,
                        premium_q_double=None)
    assert w.value == pytest.approx(2.0) and "halved" in w.detail
    assert wr.rule_fragile(1.0, 0.1, th) is None


def test_regime_flip_counts_rows():
    th = WarningThresholds(regime_flip_periods=1)
    p = np.tile([0.9, 0.1], (10, 1))
    p[-1] = [0.3, 0.7]
    w = wr.rule_regime_flip(p, th, labels=("calm", "stormy"))
    assert w.value == 0 and "calm to stormy" in w.detail
    assert wr.rule_regime_flip(p[:-1], th) is None  # no change at all


def test_status_rules():
    assert wr.rule_fit_failed("too_little_data", "need 60 rows").code == "FIT_FAILED"
    assert wr.rule_fit_failed("ok") is None and wr.rule_fit_failed(None) is None
    assert wr.rule_regime_unfit("not_converged").code == "REGIME_UNFIT"


def test_drift_statistic_is_standard_normal_when_stable():
    # Known truth: a correctly specified model (iid N(0,1) errors scored by the
    # N(0,1) density). z should be about N(0,1): over 300 seeded runs, mean within
    # 0.2 and sd within [0.8, 1.25].
    rng = np.random.default_rng(61)
    z = np.array([wr.predictive_loglik_drift(stats.norm.logpdf(rng.standard_normal(400)),
                                             21).z for _ in range(300)])
    assert abs(z.mean()) < 0.2 and 0.8 < z.std() < 1.25


def test_drift_statistic_needs_a_baseline():
    d = wr.predictive_loglik_drift(np.zeros(40), window=21)
    assert d.status == "too_little_data" and math.isnan(d.z)
    assert wr.rule_drift(d, WarningThresholds()) is None


def test_stale_lower_frequency_and_business_days():
    th = WarningThresholds()
    # Friday -> next Tuesday is 2 business days: not stale at the default 3.
    assert wr.rule_stale("2024-03-01", "2024-03-05", "daily", th) is None
    # with Monday a holiday only 1 business day has passed
    assert wr.rule_stale("2024-03-01", "2024-03-06", "daily", th,
                         holidays=["2024-03-04"]) is None
    assert wr.rule_stale("2024-03-01", "2024-03-06", "daily", th) is not None
    assert wr.rule_stale("2024-01-31", "2024-02-29", "monthly", th).value == 1
    assert wr.rule_stale("2024-02-29", "2024-02-29", "monthly", th) is None


def test_gap_respects_holidays_and_lower_frequency():
    th = WarningThresholds()
    d = _gappy_dates(4)
    holes = business_days("2023-01-02", "2024-03-01")[100:104]
    assert wr.rule_gap(d, "daily", th) is not None
    assert wr.rule_gap(d, "daily", th, holidays=holes) is None
    months = np.array(["2023-01-31", "2023-02-28", "2023-04-30", "2023-05-31"],
                      dtype="datetime64[D]")
    w = wr.rule_gap(months, "monthly", th)
    assert w.value == 1 and "2023-02-28" in w.detail
    assert wr.rule_gap(np.delete(months, 2), "monthly", th) is not None
    assert wr.rule_gap(months[:2], "monthly", th) is None


def test_freq_mismatch_month_ends_are_monthly():
    th = WarningThresholds()
    month_ends = (np.arange(np.datetime64("2020-02"), np.datetime64("2024-02"))
                  .astype("datetime64[D]") - 1)
    assert wr.rule_freq_mismatch(month_ends, "monthly", th) is None
    assert wr.rule_freq_mismatch(month_ends, "daily", th) is not None
    assert wr.rule_freq_mismatch(month_ends, "quarterly", th) is not None


def test_outlier_only_checks_recent_rows():
    th = WarningThresholds(outlier_lookback=5)
    e = np.zeros(100)
    e[-6] = 12.0
    assert wr.rule_outlier(e, th) is None
    e[-5] = -12.0
    w = wr.rule_outlier(e, th)
    assert w.value == 12.0 and "1 of the last 5" in w.detail


def test_longest_run_by_hand():
    assert wr.longest_run([1, 2, 2, np.nan, 2, 2, 2, 0, 0, 0, 0])[:2] == (4, 10)
    assert wr.longest_run([1.0, 1.0, 1.0, 2.0])[::2] == (3, 1.0)
    assert wr.longest_run([np.nan, np.nan])[0] == 0  # NaNs are not a repeated value
    assert wr.longest_run([])[0] == 0


def test_hindsight_gap_picks_nanargmax_date():
    # Reference: numpy's nanargmax over the usable gaps (finite, positive sd), the rule's
    # definition; the rule finds the same first largest gap without nanargmax's copies.
    rng = np.random.default_rng(3)
    th = WarningThresholds(hindsight_gap_sd=0.5)
    for _ in range(300):
        n = int(rng.integers(1, 30))
        f, s, sd = rng.normal(size=n), rng.normal(size=n), rng.uniform(-0.2, 2.0, size=n)
        for a in (f, s, sd):
            a[rng.random(n) < 0.15] = np.nan
        sd[rng.random(n) < 0.1] = 0.0
        with np.errstate(divide="ignore", invalid="ignore"):
            gap = np.abs(s - f) / sd
        gap[~np.isfinite(gap) | ~(sd > 0)] = np.nan
        got = wr.rule_hindsight_gap(f, s, sd, th)
        if not np.isfinite(gap).any() or np.nanmax(gap) <= th.hindsight_gap_sd:
            assert got is None
        else:
            i = int(np.nanargmax(gap))
            assert got == wr._fire("HINDSIGHT_GAP", gap[i], th.hindsight_gap_sd, ago=n - 1 - i)
