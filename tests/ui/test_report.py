"""The headless report (tracker.service.report): the four formats agree with the board
and the stored warnings; the JSON fields are the documented, stable set."""

from __future__ import annotations

import csv
import io
import json
import math

import pytest
from ui_helpers import N_STORED, insert_day

from tracker.service.report import CSV_COLUMNS, SCHEMA, render_report
from tracker.service.views import CAUTION, load_board, load_detail, mark_reviewed

TOP_FIELDS = {"schema", "caution", "scenario", "since_review", "last_review", "data_through",
              "estimates_refreshed", "drops", "market", "factors", "assets"}
FACTOR_FIELDS = {"factor_id", "label", "frequency", "is_new", "n_obs", "last_date", "estimate_date", "premium_ann",
                 "band90_lo", "band90_hi", "t_stat", "p_positive", "sharpe_ann", "regime", "regime_label",
                 "n_regimes", "regime_prob", "worst_severity", "warning_codes", "changes", "warnings"}
MARKET_FIELDS = {"date", "regime", "regime_label", "n_regimes", "status", "message", "columns", "regimes"}
WARNING_FIELDS = {"code", "severity", "message", "detail", "value", "threshold", "source", "date"}


def _close(a, b) -> bool:
    if a is None:
        return b is None or not math.isfinite(b)
    return math.isclose(a, b, rel_tol=1e-12, abs_tol=1e-15)


def test_json_fields_are_the_documented_set_and_match_the_board(small_store):
    store, config = small_store
    board = load_board(store, config)
    doc = json.loads(render_report(store, config, "json"))
    assert set(doc) == TOP_FIELDS and doc["schema"] == SCHEMA and doc["caution"] == CAUTION
    assert set(doc["market"]) == MARKET_FIELDS
    assert doc["assets"]["status"] in ("ok", "unavailable")
    assert doc["data_through"] == board.header.last_data_date.isoformat()
    assert doc["drops"] == {"pending": board.header.pending_drops, "rejected": board.header.rejected_drops}
    m = doc["market"]
    assert m["regime_label"] == board.market.label
    assert [r["probability"] for r in m["regimes"]] == pytest.approx(list(board.market.probabilities))
    assert [r["expected_duration"] for r in m["regimes"]] == pytest.approx(list(board.market.durations))
    assert [f["factor_id"] for f in doc["factors"]] == [r.factor_id for r in board.rows]
    for f, r in zip(doc["factors"], board.rows):
        assert set(f) == FACTOR_FIELDS
        for key, attr in (("premium_ann", "premium_ann"), ("band90_lo", "band_lo"), ("band90_hi", "band_hi"),
                          ("t_stat", "t_stat"), ("p_positive", "p_positive"), ("regime_prob", "regime_prob")):
            assert _close(f[key], getattr(r, attr)), (r.factor_id, key)
        assert set(f["warning_codes"]) == set(r.codes) and f["changes"] == list(r.changes)
        stored = load_detail(store, r.factor_id).warnings
        assert {w["code"] for w in f["warnings"]} == {w["code"] for w in stored}
        for w in f["warnings"]:
            assert set(w) == WARNING_FIELDS and w["detail"]
        sev = [w["severity"] for w in f["warnings"]]
        rank = {"alert": 0, "caution": 1, "info": 2}
        assert sev == sorted(sev, key=rank.get)                   # most severe first


def test_text_and_markdown_carry_board_warnings_and_caution(small_store):
    store, config = small_store
    board = load_board(store, config)
    text = render_report(store, config, "text")
    md = render_report(store, config, "markdown")
    flat = " ".join(text.split())
    assert " ".join(CAUTION.split()) in flat and CAUTION in md
    assert board.market.label in text and board.market.label in md
    for r in board.rows:
        assert r.factor_id in text
        md_row = next(line for line in md.splitlines() if line.startswith(f"| {r.factor_id} |"))
        assert md_row.count("|") == 10                            # nine columns
        for w in load_detail(store, r.factor_id).warnings:
            assert w["code"] in flat and " ".join(w["detail"].split()) in flat
    assert all(len(line) <= 100 for line in text.splitlines() if not line.startswith(tuple(r.factor_id for r in board.rows))
               and not line.startswith("Factor"))


def test_csv_has_one_row_per_factor_with_the_caution(small_store):
    store, config = small_store
    board = load_board(store, config)
    rows = list(csv.DictReader(io.StringIO(render_report(store, config, "csv"))))
    assert list(rows[0]) == list(CSV_COLUMNS)
    assert [r["factor_id"] for r in rows] == [r.factor_id for r in board.rows]
    for rec, r in zip(rows, board.rows):
        assert float(rec["premium_ann"]) == pytest.approx(r.premium_ann, rel=1e-12)
        assert rec["caution"] == CAUTION and rec["market_regime"] == board.market.label
        assert set(rec["warning_codes"].split()) == set(r.codes)


def test_since_review_lists_only_changed_factors(small_store):
    store, config = small_store
    doc = json.loads(render_report(store, config, "json", since_review=True))
    changed = [r.factor_id for r in load_board(store, config).rows if r.changes]
    assert doc["since_review"] and [f["factor_id"] for f in doc["factors"]] == changed
    mark_reviewed(store, config, reviewer="test")
    doc = json.loads(render_report(store, config, "json", since_review=True))
    assert doc["factors"] == []
    assert "0 factor(s) changed since the review" in render_report(store, config, "text", since_review=True)
    insert_day(store, N_STORED + 1)
    doc = json.loads(render_report(store, config, "json", since_review=True))
    assert {f["factor_id"] for f in doc["factors"]} == {r.factor_id for r in load_board(store, config).rows}
    assert all("+1 rows" in f["changes"] for f in doc["factors"])


def test_no_review_yet_lists_everything_and_says_so(empty_store):
    store, config = empty_store
    text = render_report(store, config, "text", since_review=True)
    assert "No review stored yet" in text and "Market regime: not estimated" in text
    doc = json.loads(render_report(store, config, "json"))
    assert doc["factors"] == [] and doc["market"]["regime"] is None


def test_unknown_format_is_refused(small_store):
    store, config = small_store
    with pytest.raises(ValueError, match="unknown report format"):
        render_report(store, config, "html")
