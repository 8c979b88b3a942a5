-- The store's own bookkeeping: migrations and the catalog dump behind schema.sql.

-- name: create_migrations_table
CREATE TABLE IF NOT EXISTS schema_migrations (
    version    INTEGER PRIMARY KEY,
    name       VARCHAR NOT NULL,
    applied_at TIMESTAMP NOT NULL DEFAULT current_timestamp
);

-- name: has_migrations_table
SELECT count(*) FROM information_schema.tables WHERE table_name = 'schema_migrations';

-- name: schema_version
SELECT coalesce(max(version), 0) FROM schema_migrations;

-- name: record_migration
INSERT INTO schema_migrations (version, name) VALUES (?, ?);

-- name: sequences
SELECT sequence_name FROM duckdb_sequences() WHERE NOT temporary ORDER BY sequence_name;

-- name: tables
SELECT table_name, sql FROM duckdb_tables() WHERE NOT internal AND NOT temporary ORDER BY table_name;
