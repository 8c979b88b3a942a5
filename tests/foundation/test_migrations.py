"""The migrations, applied in order, produce the committed schema (queries/schema.sql)."""

import duckdb
import pytest

from tracker.store.connection import migrate, schema_version
from tracker.store.errors import StoreError
from tracker.store.schema_dump import catalog_sql, migrated_schema
from tracker.store.sqlfiles import migrations, schema_text, sql


def test_migrations_produce_committed_schema():
    # If this fails, run `python -m tracker.store.schema_dump > queries/schema.sql`.
    assert migrated_schema() == schema_text()


def test_schema_file_rebuilds_the_same_catalog():
    con = duckdb.connect(":memory:")
    con.execute(schema_text())
    rebuilt = catalog_sql(con)
    assert rebuilt == migrated_schema().split("\n", 3)[3]


def test_migrate_is_idempotent_and_versioned():
    con = duckdb.connect(":memory:")
    assert migrate(con) == [m.version for m in migrations()]
    assert migrate(con) == []
    assert schema_version(con) == len(migrations())


def test_newer_store_than_program_is_refused():
    con = duckdb.connect(":memory:")
    migrate(con)
    con.execute(sql("catalog.record_migration"), [len(migrations()) + 1, "from_the_future"])
    with pytest.raises(StoreError, match="newer than this program"):
        migrate(con)


def test_named_queries_resolve_and_unknown_names_fail():
    assert "FROM factors" in sql("status.factor_summary")
    with pytest.raises(KeyError):
        sql("status.no_such_query")
