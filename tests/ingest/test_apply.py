"""Applying files: revisions, idempotence, duplicates, the drop log, receipts, markers."""

from __future__ import annotations

import json
from datetime import date

import pytest
from ingest_helpers import TODAY, data_checksum, drop, fetch, inbox_of

from tracker.ingest import DATA_VERSION, DROPS_VERSION, process_inbox


def fr(*rows: str) -> str:
    return "INSERT INTO factor_returns VALUES\n" + ",\n".join(rows) + ";\n"


def run(store, *files: tuple[str, str], on_applied=None):
    st, cfg = store
    for k, (name, text) in enumerate(files):
        drop(inbox_of(store), name, text, mtime_ns=1_800_000_000_000_000_000 + k)
    return process_inbox(st, cfg, on_applied, today=TODAY)


def meta(st, key):
    rows = fetch(st, "SELECT value FROM store_meta WHERE key = ?", [key])
    return int(rows[0][0]) if rows else 0


FILE_A = fr("('MKT', DATE '2026-11-02', 0.0100)", "('MKT', DATE '2026-11-03', -0.0200)",
            "('VAL', DATE '2026-11-03', 0.0030)") + \
    "INSERT INTO risk_free (date, rate) VALUES (DATE '2026-11-03', 0.00015);\n" + \
    "INSERT INTO asset_returns VALUES ('EQ', DATE '2026-11-03', 0.011);\n"


def test_applied_rows_drop_log_and_receipt(store):
    st, cfg = store
    [o] = run(store, ("day.sql", FILE_A))
    assert o.outcome == "applied"
    assert o.rows_written == {"factors": 0, "assets": 0, "factor_returns": 3, "asset_returns": 1, "risk_free": 1}
    assert fetch(st, "SELECT ret, drop_id FROM factor_returns WHERE factor_id = 'MKT' AND date = DATE '2026-11-03'") == [
        (-0.02, o.drop_id)]
    assert fetch(st, "SELECT frequency, rate FROM risk_free") == [("daily", 0.00015)]
    row = fetch(st, "SELECT file_name, outcome, rows_json, n_revisions, size_bytes, sha256, claim_token "
                    "FROM drop_files WHERE drop_id = ?", [o.drop_id])[0]
    assert row[:4] == ("day.sql", "applied", json.dumps(o.rows_written), 0)
    assert row[4] == len(FILE_A.encode()) and len(row[5]) == 64 and len(row[6]) == 16
    applied = inbox_of(store) / "applied"
    assert (applied / "day.sql").read_text() == FILE_A
    receipt = json.loads((applied / "day.sql.receipt.json").read_text())
    assert receipt["drop_id"] == o.drop_id and receipt["outcome"] == "applied"
    assert receipt["rows"]["factor_returns"] == {"in_file": 3, "inserted": 3, "revised": 0, "unchanged": 0}
    assert receipt["n_revisions"] == 0 and receipt["sha256"] == row[5]


def test_resending_identical_rows_is_a_no_op(store):
    st, _ = store
    run(store, ("a.sql", FILE_A))
    before, version = data_checksum(st), meta(st, DATA_VERSION)
    # same rows, different bytes (a comment), so not a sha256 duplicate
    [o] = run(store, ("b.sql", "-- resent\n" + FILE_A))
    assert o.outcome == "applied" and o.n_revisions == 0
    assert o.rows_written == {t: 0 for t in o.rows_written}
    assert o.rows["factor_returns"].unchanged == 3 and o.changes == ()
    assert data_checksum(st) == before
    assert meta(st, DATA_VERSION) == version      # nothing changed: the marker does not move
    assert fetch(st, "SELECT count(*) FROM revisions") == [(0,)]


def test_a_changed_value_is_a_revision(store):
    st, _ = store
    [a] = run(store, ("a.sql", FILE_A))
    [b] = run(store, ("b.sql", fr("('MKT', DATE '2026-11-03', -0.0250)", "('MKT', DATE '2026-11-04', 0.0010)")
                      + "INSERT INTO risk_free VALUES (DATE '2026-11-03', 0.00016);"))
    assert b.outcome == "applied" and b.n_revisions == 2
    assert b.rows["factor_returns"].revised == 1 and b.rows["factor_returns"].inserted == 1
    assert sorted(fetch(st, "SELECT series_kind, series_id, date, old_value, new_value, drop_id FROM revisions")) == [
        ("factor", "MKT", date(2026, 11, 3), -0.02, -0.025, b.drop_id),
        ("risk_free", "daily", date(2026, 11, 3), 0.00015, 0.00016, b.drop_id),
    ]
    assert fetch(st, "SELECT ret, drop_id FROM factor_returns WHERE factor_id = 'MKT' AND date = DATE '2026-11-03'") == [
        (-0.025, b.drop_id)]
    # the untouched row keeps the drop that wrote it
    assert fetch(st, "SELECT drop_id FROM factor_returns WHERE factor_id = 'MKT' AND date = DATE '2026-11-02'") == [
        (a.drop_id,)]
    mkt = next(c for c in b.changes if c.series_id == "MKT")
    assert (mkt.n_inserted, mkt.n_revised, mkt.first_revised, mkt.first_date, mkt.last_date) == (
        1, 1, date(2026, 11, 3), date(2026, 11, 3), date(2026, 11, 4))
    receipt = json.loads((inbox_of(store) / "applied" / "b.sql.receipt.json").read_text())
    assert receipt["n_revisions"] == 2 and len(receipt["revisions"]) == 2
    assert fetch(st, "SELECT n_revisions FROM drop_files WHERE drop_id = ?", [b.drop_id]) == [(2,)]


def test_an_identical_file_is_recognised_even_renamed(store):
    st, _ = store
    [a] = run(store, ("monday.sql", FILE_A))
    before = data_checksum(st)
    drops_before = meta(st, DROPS_VERSION)
    [d] = run(store, ("monday-again-renamed.sql", FILE_A))
    assert (d.outcome, d.duplicate_of) == ("duplicate", a.drop_id)
    assert data_checksum(st) == before
    assert meta(st, DROPS_VERSION) == drops_before + 1
    row = fetch(st, "SELECT outcome, sha256, reason FROM drop_files WHERE drop_id = ?", [d.drop_id])[0]
    assert row[0] == "duplicate" and row[1] == a.sha256 and f"drop {a.drop_id}" in row[2]
    receipt = json.loads((inbox_of(store) / "applied" / "monday-again-renamed.sql.receipt.json").read_text())
    assert receipt["outcome"] == "duplicate" and receipt["duplicate_of"] == a.drop_id
    assert "already applied" in receipt["message"]


def test_a_rejected_file_may_be_sent_again_once_fixed(store):
    # A rejection depends on the store and the date; the same bytes are evaluated again.
    text = fr("('NEW', DATE '2026-11-03', 0.01)")
    [r] = run(store, ("x.sql", text))
    assert r.rule == "unknown_series"
    run(store, ("decl.sql", "INSERT INTO factors (factor_id, label, frequency) VALUES ('NEW', 'New', 'daily');"))
    [o] = run(store, ("x.sql", text))
    assert o.outcome == "applied"
    # the second x.sql does not overwrite the first in rejected/ or applied/
    assert (inbox_of(store) / "rejected" / "x.sql").exists()
    assert (inbox_of(store) / "applied" / "x.sql").exists()


def test_name_collisions_never_overwrite(store):
    st, _ = store
    [a] = run(store, ("day.sql", FILE_A))
    [b] = run(store, ("day.sql", fr("('MKT', DATE '2026-11-05', 0.002)")))
    applied = inbox_of(store) / "applied"
    assert (applied / "day.sql").read_text() == FILE_A
    assert b.stored_as == applied / f"day.{b.drop_id}.sql"
    assert b.stored_as.read_text().startswith("INSERT INTO factor_returns")
    assert json.loads((applied / f"day.{b.drop_id}.sql.receipt.json").read_text())["drop_id"] == b.drop_id
    assert json.loads((applied / "day.sql.receipt.json").read_text())["drop_id"] == a.drop_id


def test_markers_move_with_every_outcome(store):
    st, _ = store
    d0, v0 = meta(st, DROPS_VERSION), meta(st, DATA_VERSION)
    outs = run(store, ("1.sql", FILE_A), ("2.sql", "DROP TABLE factors;"), ("3.sql", FILE_A))
    assert [o.outcome for o in outs] == ["applied", "rejected", "duplicate"]
    assert meta(st, DROPS_VERSION) == d0 + 3
    assert meta(st, DATA_VERSION) == v0 + 1
    assert outs[0].data_version == v0 + 1 and outs[2].data_version == v0 + 1


def test_on_applied_runs_after_the_commit(store):
    st, _ = store
    seen = []

    def callback(outcome):
        # The row is visible from a fresh connection: the transaction has committed.
        seen.append((outcome.file_name, fetch(st, "SELECT count(*) FROM factor_returns WHERE drop_id = ?",
                                              [outcome.drop_id])[0][0], outcome.stored_as.exists()))

    run(store, ("1.sql", FILE_A), ("2.sql", "DELETE FROM factors;"), ("3.sql", FILE_A),
        on_applied=callback)
    assert seen == [("1.sql", 3, True)]   # not for rejected or duplicate files


def test_a_failing_callback_leaves_later_files_waiting(store):
    st, cfg = store

    def boom(outcome):
        raise RuntimeError("service down")

    with pytest.raises(RuntimeError):
        run(store, ("1.sql", FILE_A), ("2.sql", fr("('MKT', DATE '2026-11-06', 0.001)")), on_applied=boom)
    inbox = inbox_of(store)
    assert (inbox / "applied" / "1.sql").exists() and (inbox / "2.sql").exists()
    [o] = process_inbox(st, cfg, today=TODAY)
    assert o.file_name == "2.sql" and o.outcome == "applied"


def test_positional_defaults_and_column_lists(store):
    st, _ = store
    [o] = run(store, ("d.sql",
                      "INSERT INTO factors VALUES ('F4', 'Four values', 'desc', 'monthly');\n"
                      "INSERT INTO factors (frequency, factor_id, label, is_new) VALUES ('daily', 'F5', 'Listed', TRUE);\n"
                      "INSERT INTO assets (asset_id, label, frequency, description) VALUES ('A2', 'x', 'daily', NULL);\n"
                      "INSERT INTO risk_free VALUES (DATE '2026-10-30', 0.003, 'monthly');\n"
                      "INSERT INTO risk_free (rate, date, frequency) VALUES (0.0001, '2026-11-03', NULL);"))
    assert o.outcome == "applied", o.reason
    assert fetch(st, "SELECT factor_id, description, frequency, is_traded, is_new, start_date FROM factors "
                     "WHERE factor_id IN ('F4', 'F5') ORDER BY 1") == [
        ("F4", "desc", "monthly", True, False, None), ("F5", "", "daily", True, True, None)]
    assert fetch(st, "SELECT description FROM assets WHERE asset_id = 'A2'") == [("",)]
    assert fetch(st, "SELECT frequency, date, rate FROM risk_free ORDER BY 1") == [
        ("daily", date(2026, 11, 3), 0.0001), ("monthly", date(2026, 10, 30), 0.003)]


def test_demo_drop_files_apply_to_the_demo_store(demo_store):
    # The scenario's own drop format (seed_db/scenario.py drop_file_text) is accepted.
    from tracker.seed_db.scenario import drop_file_text, generate, held_back_days

    st, cfg = demo_store
    scn = generate()
    day = held_back_days(scn)[0]
    drop(cfg.inbox_path(st.folder), "demo.sql", drop_file_text(scn, day))
    [o] = process_inbox(st, cfg, today=day.date())
    assert o.outcome == "applied", o.reason
    assert o.rows_written["factor_returns"] == 10 and o.rows_written["asset_returns"] == 10
    assert o.rows_written["risk_free"] == 1
    got = dict(fetch(st, "SELECT factor_id, ret FROM factor_returns WHERE date = ?", [day.date()]))
    want = scn.factor_returns[scn.factor_returns["date"] == day].set_index("factor_id")["ret"]
    assert got.keys() == set(want.index)
    for k, v in want.items():  # written with 10 decimals by drop_file_text
        assert got[k] == pytest.approx(v, abs=5e-11)


def test_byte_order_mark_and_windows_line_ends(store):
    st, _ = store
    text = "\ufeff-- written on another system\r\n" + fr("('MKT', DATE '2026-11-03', 0.01)",
                                                          "('VAL', DATE '2026-11-03', 0.02)").replace("\n", "\r\n")
    [o] = run(store, ("crlf.sql", text))
    assert o.outcome == "applied", o.reason
    assert o.rows_written["factor_returns"] == 2
    [bad] = run(store, ("crlf-bad.sql", text.replace("0.02", "'x'")))
    assert bad.rule == "bad_value" and bad.reason.startswith("statement 1, line 4:")  # the VAL row
