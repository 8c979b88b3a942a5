"""Hostile and malformed drop files: each gets its documented outcome and changes nothing.

The corpus lives in tests/ingest/corpus/, with the expected rule, statement and line of
each file in corpus/expected.json (the rules are listed in tracker/ingest/validate.py and
tracker/ingest/sandbox.py). The sandbox is also attacked directly, bypassing the
scanner, to show that it would stop file access on its own.
"""

from __future__ import annotations

import json
from pathlib import Path

import duckdb
import pytest
from ingest_helpers import TODAY, data_checksum, drop, fetch, inbox_of

from tracker.ingest import process_inbox
from tracker.ingest.sandbox import open_sandbox, parse_drop

CORPUS = Path(__file__).parent / "corpus"
EXPECTED = json.loads((CORPUS / "expected.json").read_text("utf-8"))


def test_the_corpus_is_complete():
    on_disk = {p.name for p in CORPUS.iterdir() if p.suffix == ".sql"}
    assert on_disk == set(EXPECTED)
    # every forbidden statement family the issue names has a file
    for family in ("delete", "drop_table", "create_table", "update", "copy_to", "copy_from", "attach",
                   "detach", "pragma", "set", "install", "load", "transaction", "call", "export",
                   "select_read_csv"):
        assert f"stmt_{family}.sql" in on_disk


@pytest.fixture(scope="module")
def corpus_run(tmp_path_factory):
    """All corpus files dropped into one seeded store and processed in one pass."""
    from ingest_helpers import seed_history

    from tracker.store.bootstrap import open_store

    st, cfg = open_store(tmp_path_factory.mktemp("corpus") / "store.duckdb", create_demo=False)
    with st.connect() as con:
        seed_history(con)
    before = data_checksum(st)
    inbox = cfg.inbox_path(st.folder)
    for k, name in enumerate(sorted(EXPECTED)):
        drop(inbox, name, (CORPUS / name).read_bytes(), mtime_ns=1_700_000_000_000_000_000 + k)
    outcomes = process_inbox(st, cfg, today=TODAY)
    return st, cfg, before, {o.file_name: o for o in outcomes}


@pytest.mark.parametrize("name", sorted(EXPECTED))
def test_hostile_file_gets_its_documented_outcome(corpus_run, name):
    st, cfg, _, outcomes = corpus_run
    exp = EXPECTED[name]
    o = outcomes[name]
    assert o.outcome == "rejected"
    assert o.rule == exp["rule"], o.reason
    where = [f"statement {exp['statement']}"] if exp["statement"] else []
    where += [f"line {exp['line']}"] if exp["line"] else []
    if where:
        assert o.reason.startswith(", ".join(where) + ": "), o.reason
    else:
        assert not o.reason.startswith(("statement", "line")), o.reason
    # logged in drop_files with the same reason, moved to rejected/ untouched, receipt beside it
    row = fetch(st, "SELECT outcome, reason, rows_json, n_revisions FROM drop_files WHERE drop_id = ?", [o.drop_id])
    assert row == [("rejected", o.reason, "{}", 0)]
    rejected = inbox_of((st, cfg)) / "rejected"
    assert (rejected / name).read_bytes() == (CORPUS / name).read_bytes()
    receipt = json.loads((rejected / (name + ".receipt.json")).read_text("utf-8"))
    assert receipt["outcome"] == "rejected" and receipt["rule"] == exp["rule"]
    assert receipt["reason"] == o.reason


def test_rejected_files_leave_the_store_unchanged(corpus_run):
    st, cfg, before, outcomes = corpus_run
    assert len(outcomes) == len(EXPECTED)
    assert data_checksum(st) == before
    inbox = inbox_of((st, cfg))
    assert [p.name for p in inbox.iterdir() if p.is_file()] == []
    assert list((inbox / "processing").iterdir()) == []
    assert not Path("/tmp/tracker-leak.csv").exists()


def test_a_valid_statement_does_not_rescue_a_file(store):
    st, cfg = store
    before = data_checksum(st)
    drop(inbox_of(store), "mixed.sql", (CORPUS / "valid_then_drop.sql").read_text())
    [o] = process_inbox(st, cfg, today=TODAY)
    assert o.outcome == "rejected" and "statement 2" in o.reason
    assert data_checksum(st) == before
    assert fetch(st, "SELECT count(*) FROM factor_returns WHERE date = DATE '2026-11-03'") == [(0,)]


# ---------------------------------------------------------------- the sandbox on its own

@pytest.fixture()
def secret(tmp_path) -> Path:
    path = tmp_path / "secret.csv"
    path.write_text("a,b\n1,2\n")
    return path


def test_a_normal_duckdb_could_read_the_file(secret):
    # The control for the tests below: the same queries do read files outside the sandbox.
    con = duckdb.connect()
    assert con.execute(f"SELECT count(*) FROM read_csv('{secret}')").fetchall() == [(1,)]


@pytest.mark.parametrize("query", [
    "INSERT INTO factor_returns VALUES ((SELECT content FROM read_text('{p}')), DATE '2026-11-03', 0.01)",
    "INSERT INTO factor_returns VALUES ('MKT', DATE '2026-11-03', (SELECT count(*) FROM read_csv('{p}')))",
    "INSERT INTO factors VALUES ((SELECT string_agg(file, ',') FROM glob('{d}/*')), 'x', '', 'daily', TRUE, FALSE, NULL)",
    "INSERT INTO factor_returns SELECT 'MKT', DATE '2026-11-03', count(*) FROM '{p}'",
    "COPY factor_returns TO '{d}/leak.csv'",
    "COPY factor_returns FROM '{p}'",
    "ATTACH '{d}/other.duckdb' AS other",
    "INSTALL httpfs",
    "LOAD httpfs",
    "SET enable_external_access = true",
    "SET memory_limit = '64GB'",
    "SET lock_configuration = false",
    "SELECT getenv('HOME')",
])
def test_sandbox_refuses_file_access_and_setting_changes(secret, query):
    con = open_sandbox()
    with pytest.raises(duckdb.Error):
        con.execute(query.format(p=secret, d=secret.parent)).fetchall()
    assert not (secret.parent / "leak.csv").exists()
    assert not (secret.parent / "other.duckdb").exists()
    settings = dict(con.execute(
        "SELECT name, value FROM duckdb_settings() WHERE name IN "
        "('enable_external_access', 'lock_configuration', 'autoload_known_extensions', "
        "'autoinstall_known_extensions', 'threads')").fetchall())
    assert settings == {"enable_external_access": "false", "lock_configuration": "true",
                        "autoload_known_extensions": "false", "autoinstall_known_extensions": "false",
                        "threads": "1"}


def test_sandbox_holds_only_the_five_staging_tables():
    con = open_sandbox()
    tables = {r[0] for r in con.execute("SELECT table_name FROM information_schema.tables").fetchall()}
    assert tables == {"factor_returns", "asset_returns", "risk_free", "factors", "assets"}


def test_sandbox_tables_match_the_format():
    from tracker.ingest.dropformat import TABLES

    con = open_sandbox()
    for name, t in TABLES.items():
        cols = con.execute("SELECT column_name, data_type FROM information_schema.columns "
                           "WHERE table_name = ? ORDER BY ordinal_position", [name]).fetchall()
        assert cols == [(c.name, c.sql_type) for c in t.columns]


def test_constant_arithmetic_is_evaluated_in_the_sandbox():
    staged = parse_drop(b"INSERT INTO factor_returns VALUES ('MKT', DATE '2026-11-03', 0.05 / 250);")
    assert staged.tables["factor_returns"].values["ret"][0] == 0.05 / 250


def test_the_time_limit_interrupts_a_long_sandbox_query(monkeypatch):
    # No constant expression the scanner admits runs long, so a slow query stands in for one.
    import tracker.ingest.sandbox as sandbox

    def slow(con, text):
        con.execute("SELECT sum(i * i) FROM range(100000000000) t(i)").fetchall()

    monkeypatch.setattr(sandbox, "_parse", slow)
    with pytest.raises(sandbox.Rejected) as info:
        sandbox.parse_drop(b"INSERT INTO factor_returns VALUES ('MKT', DATE '2026-11-03', 0.01);",
                           time_limit_s=0.3)
    assert info.value.rejection.rule == "sandbox_limit"


def test_scanner_screens_even_if_duckdb_would_run_it(secret):
    # Belt and braces: the scanner rejects the subquery before the sandbox ever sees it.
    text = f"INSERT INTO factor_returns VALUES ((SELECT content FROM read_text('{secret}')), DATE '2026-11-03', 0.01);"
    from tracker.ingest.scanner import ScanError, scan

    with pytest.raises(ScanError) as info:
        scan(text)
    assert info.value.rule == "not_constant"


def test_a_kept_sandbox_starts_each_file_with_empty_tables_and_a_failed_one_is_closed(monkeypatch):
    # A process keeps one sandbox between files (opening one costs ~0.03 s): the next file
    # must not see the previous file's rows, and a sandbox that saw a failure is not reused.
    import tracker.ingest.sandbox as sandbox

    seen = []
    real = sandbox._parse

    def spy(con, text):
        rows = sum(con.execute(f"SELECT count(*) FROM {t}").fetchall()[0][0]
                   for t in ("factor_returns", "asset_returns", "risk_free", "factors", "assets"))
        seen.append((con, rows))
        staged = real(con, text)
        # a row left behind in a staging table (the reader clears what it inserts; this
        # stands in for anything it might not) must not reach the next file
        con.execute("INSERT INTO risk_free VALUES (DATE '2026-11-02', 0.0001, 'daily')").fetchall()
        return staged

    monkeypatch.setattr(sandbox, "_parse", spy)
    first = parse_drop(b"INSERT INTO factor_returns VALUES ('MKT', DATE '2026-11-03', 0.05 / 250);")
    second = parse_drop(b"INSERT INTO factor_returns VALUES ('SMB', DATE '2026-11-04', 1 + 1);")
    assert seen[0][0] is seen[1][0] and [n for _, n in seen] == [0, 0]
    assert list(second.tables["factor_returns"].values["factor_id"]) == ["SMB"]
    assert first.tables["factor_returns"].values["ret"][0] == 0.05 / 250   # still its own values
    with pytest.raises(sandbox.Rejected):
        parse_drop(b"INSERT INTO factor_returns VALUES ('SMB', DATE '2026-11-04', 1 / 'x');")
    with pytest.raises(duckdb.Error):          # the failed file's sandbox was closed
        seen[2][0].execute("SELECT 1").fetchall()
    parse_drop(b"INSERT INTO factor_returns VALUES ('HML', DATE '2026-11-05', 0.001);")
    assert seen[3][0] is not seen[2][0] and seen[3][1] == 0
