"""Row rules (tracker/ingest/validate.py): each rejection and warning, and a property test
holding the validator to a plain re-statement of the rules."""

from __future__ import annotations

import math
from datetime import date, timedelta

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, event, given, settings
from hypothesis import strategies as hs
from ingest_helpers import TODAY, data_checksum, drop, fetch, inbox_of

from tracker.config import IngestSettings
from tracker.ingest import process_inbox
from tracker.ingest.sandbox import parse_drop
from tracker.ingest.validate import Invalid, check_declarations, check_returns


def run_one(store, text: str, name: str = "f.sql"):
    st, cfg = store
    drop(inbox_of(store), name, text)
    [o] = process_inbox(st, cfg, today=TODAY)
    return o


def fr(*rows: str) -> str:
    return "INSERT INTO factor_returns VALUES\n" + ",\n".join(rows) + ";\n"


# ---------------------------------------------------------------- rejections, one by one

REJECTIONS = [
    # (rule, file text, line of the offending row)
    ("missing_value", fr("('MKT', DATE '2026-11-03', 0.01)", "('MKT', DATE '2026-11-04', NULL)"), 3),
    ("missing_value", "INSERT INTO factors (factor_id, label, frequency) VALUES ('NEW', NULL, 'daily');", 1),
    ("bad_id", "INSERT INTO factors (factor_id, label, frequency) VALUES ('has space', 'x', 'daily');", 1),
    ("bad_id", "INSERT INTO assets (asset_id, label, frequency) VALUES ('*market*', 'x', 'daily');", 1),
    ("bad_label", "INSERT INTO factors (factor_id, label, frequency) VALUES ('NEW', '  ', 'daily');", 1),
    ("bad_frequency", "INSERT INTO factors (factor_id, label, frequency) VALUES ('NEW', 'x', 'weekly');", 1),
    ("bad_frequency", "INSERT INTO risk_free VALUES (DATE '2026-11-03', 0.0001, 'Daily');", 1),
    ("duplicate_key", fr("('MKT', DATE '2026-11-03', 0.01)", "('VAL', DATE '2026-11-03', 0.01)",
                         "('MKT', DATE '2026-11-03', 0.01)"), 4),
    ("duplicate_key", "INSERT INTO factors (factor_id, label, frequency) VALUES ('N1', 'x', 'daily'),\n"
                      "('N1', 'x', 'daily');", 2),
    ("redeclared", "INSERT INTO factors (factor_id, label, frequency, start_date) VALUES\n"
                   "('MKT', 'Market', 'monthly', DATE '2020-01-02');", 2),
    ("redeclared", "INSERT INTO factors VALUES ('MKT', 'Market', 'equity market minus cash', 'daily', TRUE, "
                   "TRUE, DATE '2020-01-02');", 1),
    ("id_clash", "INSERT INTO assets (asset_id, label, frequency) VALUES ('MKT', 'Market sleeve', 'daily');", 1),
    ("id_clash", "INSERT INTO factors (factor_id, label, frequency) VALUES ('EQ', 'x', 'daily');", 1),
    ("unknown_series", fr("('MKT', DATE '2026-11-03', 0.01)", "('GHOST', DATE '2026-11-03', 0.01)"), 3),
    ("unknown_series", "INSERT INTO asset_returns VALUES ('MKT', DATE '2026-11-03', 0.01);", 1),
    ("non_finite", fr("('MKT', DATE '2026-11-03', 'NaN')"), 2),
    ("non_finite", fr("('MKT', DATE '2026-11-03', '-inf')"), 2),
    ("implausible_date", fr("('VAL', DATE '1899-12-29', 0.01)"), 2),
    ("future_date", fr("('MKT', DATE '2026-12-02', 0.01)"), 2),
    ("before_start", fr("('MKT', DATE '2020-01-01', 0.01)"), 2),
    ("before_start", "INSERT INTO factors (factor_id, label, frequency, start_date) VALUES "
                     "('NEW', 'x', 'daily', DATE '2026-06-01');\n" + fr("('NEW', DATE '2026-05-29', 0.01)"), 3),
    ("return_floor", fr("('MKT', DATE '2026-11-03', -1.0)"), 2),
    ("return_floor", "INSERT INTO asset_returns VALUES ('EQ', DATE '2026-11-03', -1.25);", 1),
    ("too_large", fr("('MKT', DATE '2026-11-03', 1.0)"), 2),
    ("too_large", "INSERT INTO risk_free VALUES (DATE '2026-11-03', 3.5);", 1),
]


@pytest.mark.parametrize("rule,text,line", REJECTIONS, ids=[f"{r[0]}-{i}" for i, r in enumerate(REJECTIONS)])
def test_each_rule_rejects_the_whole_file_and_names_the_line(store, rule, text, line):
    st, _ = store
    before = data_checksum(st)
    o = run_one(store, text)
    assert (o.outcome, o.rule) == ("rejected", rule), o.reason
    assert f"line {line}:" in o.reason
    assert data_checksum(st) == before


def test_the_rejection_counts_the_other_bad_rows(store):
    o = run_one(store, fr("('MKT', DATE '2026-11-03', 0.01)", "('MKT', DATE '2026-12-05', 0.01)",
                          "('GHOST', DATE '2026-11-03', 0.01)", "('VAL', DATE '2026-11-04', 'NaN')"))
    assert o.rule == "future_date" and "line 3:" in o.reason
    assert "2 more row(s) break rules" in o.reason


@pytest.mark.parametrize("text", [
    fr("('MKT', DATE '2026-11-03', -0.999999)"),                      # just above -100 %
    fr("('MKT', DATE '2026-11-03', 0.999999)"),                       # just below reject_abs_return
    fr("('MKT', DATE '2026-12-01', 0.001)"),                          # today
    fr("('MKT', DATE '2020-01-02', 0.001)"),                          # the start date itself
    "INSERT INTO factors VALUES ('MKT', 'Market', 'equity market minus cash', 'daily', TRUE, FALSE, "
    "DATE '2020-01-02');",                                             # identical re-declaration
    "INSERT INTO risk_free VALUES (DATE '2026-11-03', -0.0001);",      # negative rates exist
])
def test_boundary_rows_are_accepted(store, text):
    o = run_one(store, text)
    assert o.outcome == "applied", o.reason


def test_reject_abs_return_is_read_from_the_settings(store):
    import dataclasses

    st, cfg = store
    cfg = dataclasses.replace(cfg, ingest=dataclasses.replace(cfg.ingest, reject_abs_return=0.25))
    drop(inbox_of(store), "f.sql", fr("('MKT', DATE '2026-11-03', 0.3)"))
    [o] = process_inbox(st, cfg, today=TODAY)
    assert o.rule == "too_large" and "0.25" in o.reason


def test_declarations_and_their_first_returns_in_one_file(store):
    st, _ = store
    o = run_one(store, "INSERT INTO factors (factor_id, label, frequency, start_date) VALUES "
                       "('NEW', 'Brand new', 'daily', '2026-11-02');\n"
                       "INSERT INTO assets VALUES ('SL2', 'Sleeve two', 'test sleeve', 'monthly', NULL);\n"
                       + fr("('NEW', DATE '2026-11-02', 0.004)", "('NEW', DATE '2026-11-03', -0.002)")
                       + "INSERT INTO asset_returns VALUES ('SL2', DATE '2026-10-30', 0.01);")
    assert o.outcome == "applied", o.reason
    assert set(o.declared) == {"factor:NEW", "asset:SL2"}
    assert fetch(st, "SELECT label, is_traded, is_new, start_date, declared_by FROM factors WHERE factor_id = 'NEW'") == [
        ("Brand new", True, False, date(2026, 11, 2), o.drop_id)]
    assert fetch(st, "SELECT description, frequency FROM assets WHERE asset_id = 'SL2'") == [("test sleeve", "monthly")]
    assert fetch(st, "SELECT count(*) FROM factor_returns WHERE factor_id = 'NEW'") == [(2,)]


# ---------------------------------------------------------------- warnings

def codes(o):
    return [w.code for w in o.warnings]


def test_large_move_against_the_stored_sd(store):
    st, _ = store
    # Reference: sample sd of MKT's last 63 stored returns, computed here independently.
    rets = [r[0] for r in fetch(st, "SELECT ret FROM factor_returns WHERE factor_id = 'MKT' ORDER BY date DESC LIMIT 63")]
    sd = float(np.std(rets, ddof=1))
    big, small = float(8.5 * sd), float(7.5 * sd)
    o = run_one(store, fr(f"('MKT', DATE '2026-11-03', {big!r})", f"('MKT', DATE '2026-11-04', {-small!r})"))
    assert o.outcome == "applied"
    assert codes(o) == ["large_move"]
    w = o.warnings[0]
    assert w.series_id == "MKT" and w.line == 2 and w.date == "2026-11-03"
    assert w.threshold == pytest.approx(8.0 * sd, rel=1e-9)


def test_large_move_without_history_uses_the_file_itself(store):
    rng = np.random.default_rng(3)
    days = pd.bdate_range("2026-06-01", periods=40)
    vals = rng.normal(0, 0.004, 40)
    vals[25] = 0.2
    rows = [f"('NEW', DATE '{d:%Y-%m-%d}', {float(v)!r})" for d, v in zip(days, vals)]
    o = run_one(store, "INSERT INTO factors (factor_id, label, frequency) VALUES ('NEW', 'x', 'daily');\n" + fr(*rows))
    assert o.outcome == "applied", o.reason
    # robust sd: 1.4826 x median absolute deviation from the median (the documented rule)
    mad = 1.4826 * np.median(np.abs(vals - np.median(vals)))
    flagged = np.flatnonzero(np.abs(vals) > 8 * mad)
    assert [w.line for w in o.warnings if w.code == "large_move"] == [3 + int(i) for i in flagged]
    assert 25 in flagged


def test_weekend_and_month_end_warnings(store):
    o = run_one(store, fr(
        "('MKT', DATE '2026-11-07', 0.001)",      # a Saturday
        "('MVAL', DATE '2026-10-30', 0.01)",      # last weekday of October 2026 (the 31st is a Saturday)
        "('MVAL', DATE '2026-09-30', 0.01)",      # last calendar day
        "('MVAL', DATE '2026-08-14', 0.01)",      # mid-month
    ))
    assert o.outcome == "applied"
    assert [(w.code, w.line) for w in o.warnings] == [("weekend_date", 2), ("not_month_end", 5)]


def test_two_rows_in_one_month_counts_stored_rows(store):
    first = run_one(store, fr("('MVAL', DATE '2026-09-30', 0.01)"), "a.sql")
    assert codes(first) == []
    o = run_one(store, fr("('MVAL', DATE '2026-09-29', 0.01)", "('MVAL', DATE '2026-07-31', 0.01)"), "b.sql")
    assert o.outcome == "applied"
    assert sorted(codes(o)) == ["not_month_end", "two_rows_in_month"]
    assert {w.line for w in o.warnings} == {2}


def test_warnings_are_stored_and_capped(store):
    st, _ = store
    days = pd.date_range("2024-01-06", periods=90, freq="7D")        # all Saturdays
    o = run_one(store, fr(*[f"('VAL', DATE '{d:%Y-%m-%d}', 0.001)" for d in days]))
    assert o.outcome == "applied", o.reason
    assert o.n_warnings == 90 and len(o.warnings) == 50
    stored = fetch(st, "SELECT warnings_json FROM drop_files WHERE drop_id = ?", [o.drop_id])[0][0]
    import json

    w = json.loads(stored)
    assert len(w) == 51 and w[-1] == {"code": "more_warnings", "count": 40, "message": "40 more warning(s) not listed"}


# ---------------------------------------------------------------- property test

SERIES = {  # id -> (start date, stored reference sd or None)
    "MKT": (date(2020, 1, 2), 0.01),
    "VAL": (None, 0.005),
    "NEWF": (date(2026, 6, 1), None),
}
STORED = {
    "factors": pd.DataFrame({
        "factor_id": ["MKT", "VAL"], "label": ["Market", "Value"], "description": ["", ""],
        "frequency": ["daily", "daily"], "is_traded": [True, True], "is_new": [False, False],
        "start_date": [pd.Timestamp("2020-01-02"), pd.NaT]}).set_index("factor_id"),
    "assets": pd.DataFrame({"asset_id": pd.Series([], dtype=object), "label": [], "description": [],
                            "frequency": [], "start_date": []}).set_index("asset_id"),
}
TRAILING = {"factor_returns": pd.DataFrame({"id": ["MKT", "VAL"], "sd": [0.01, 0.005], "n": [63, 63]}).set_index("id")}

value_st = hs.one_of(
    hs.floats(-0.05, 0.05, allow_nan=False),
    hs.floats(-0.05, 0.05, allow_nan=False),
    hs.floats(-3, 3, allow_nan=False),
    hs.sampled_from([math.nan, math.inf, -math.inf, -1.0, -1.5, 1.0, 0.999, -0.999, 0.0, 0.2, -0.2]),
)
date_st = hs.one_of(
    hs.dates(date(2019, 12, 1), date(2026, 12, 10)),
    hs.dates(date(2026, 6, 1), TODAY),
    hs.sampled_from([date(2020, 1, 1), date(2020, 1, 2), date(2026, 5, 29), date(2026, 6, 1),
                     TODAY, TODAY + timedelta(days=1)]),
)
row_st = hs.tuples(hs.sampled_from(["MKT", "VAL", "NEWF", "NEWF", "GHOST"]), date_st, value_st)


@hs.composite
def file_rows(draw):
    """Rows of one factor_returns statement: mixed series, or one new series long enough
    for the file-based reference sd; now and then a key repeated."""
    if draw(hs.booleans()):
        rows = draw(hs.lists(row_st, min_size=1, max_size=30, unique_by=lambda r: (r[0], r[1])))
    else:
        rows = draw(hs.lists(hs.tuples(hs.just("NEWF"), hs.dates(date(2026, 6, 1), TODAY),
                                       hs.floats(-0.01, 0.01) | hs.just(0.3)),
                             min_size=20, max_size=40, unique_by=lambda r: r[1]))
    if draw(hs.integers(0, 4)) == 0:
        k = draw(hs.integers(0, len(rows) - 1))
        rows.insert(draw(hs.integers(k + 1, len(rows))), (rows[k][0], rows[k][1], draw(value_st)))
    return rows


def literal(v: float) -> str:
    return repr(v) if math.isfinite(v) else f"'{v}'"


def oracle_violations(rows):
    seen, out = set(), []
    for fid, d, v in rows:
        bad = set()
        if fid == "GHOST":
            bad.add("unknown_series")
        if not math.isfinite(v):
            bad.add("non_finite")
        if d > TODAY:
            bad.add("future_date")
        start = SERIES.get(fid, (None, None))[0]
        if start is not None and d < start:
            bad.add("before_start")
        if math.isfinite(v) and v <= -1:
            bad.add("return_floor")
        elif math.isfinite(v) and abs(v) >= 1.0:
            bad.add("too_large")
        if (fid, d) in seen:
            bad.add("duplicate_key")
        seen.add((fid, d))
        out.append(bad)
    return out


def oracle_warnings(rows):
    n = 0
    for fid, d, v in rows:
        n += d.weekday() >= 5
    ref = {k: sd for k, (_, sd) in SERIES.items() if sd is not None}
    newf = np.array([v for fid, _, v in rows if fid == "NEWF"])
    if len(newf) >= 20:
        mad = 1.4826 * np.median(np.abs(newf - np.median(newf)))
        if mad > 0:
            ref["NEWF"] = mad
    n += sum(1 for fid, _, v in rows if fid in ref and abs(v) > 8.0 * ref[fid])
    return n


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(file_rows())
def test_validator_agrees_with_the_rules_restated(rows):
    text = ("INSERT INTO factors (factor_id, label, frequency, start_date) VALUES ('NEWF', 'New', 'daily', '2026-06-01');\n"
            "INSERT INTO factor_returns VALUES\n"
            + ",\n".join(f"('{fid}', DATE '{d.isoformat()}', {literal(v)})" for fid, d, v in rows) + ";")
    staged = parse_drop(text.encode())
    plan = check_declarations(staged, STORED)
    violations = oracle_violations(rows)
    try:
        checked = check_returns(staged, plan, TRAILING, {}, IngestSettings(), TODAY)
    except Invalid as exc:
        event(f"rejected: {exc.rejection.rule}")
        bad_rows = [i for i, v in enumerate(violations) if v]
        assert bad_rows, f"rejected a valid file: {exc.rejection.reason}"
        first = bad_rows[0]
        assert exc.rejection.rule in violations[first]
        assert (exc.rejection.statement, exc.rejection.line) == (2, first + 3)
        return
    event("accepted")
    assert not any(violations), "accepted a file that breaks a rule"
    assert checked.n_warnings == oracle_warnings(rows)
    assert len(checked.returns["factor_returns"]) == len(rows)
