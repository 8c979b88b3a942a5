-- Queries of the drop-file ingestion (tracker/ingest/).
-- Two kinds: queries run in the in-memory sandbox (sandbox_*), and queries run against
-- the store. Values are always bound as parameters or read from a registered frame
-- named incoming_frame / cells. The few templates with {braces} take only table and
-- column names from tracker.ingest.dropformat.TABLES, never values.

-- name: sandbox_schema
-- Staging tables with the drop tables' names and columns, without constraints, so a
-- bad value is reported by the validator with its line instead of a constraint error.
CREATE TABLE factor_returns (factor_id VARCHAR, date DATE, ret DOUBLE);
CREATE TABLE asset_returns (asset_id VARCHAR, date DATE, ret DOUBLE);
CREATE TABLE risk_free (date DATE, rate DOUBLE, frequency VARCHAR);
CREATE TABLE factors (factor_id VARCHAR, label VARCHAR, description VARCHAR, frequency VARCHAR,
                      is_traded BOOLEAN, is_new BOOLEAN, start_date DATE);
CREATE TABLE assets (asset_id VARCHAR, label VARCHAR, description VARCHAR, frequency VARCHAR,
                     start_date DATE);

-- name: sandbox_decode_varchar
-- cells(q, b): q the text between the quotes, b the bare token ('' when quoted).
SELECT CASE WHEN b = '' THEN replace(q, '''''', '''') END AS v, TRUE AS ok FROM cells;

-- name: sandbox_decode_date
-- Years outside 1..9999 are not valid here (DuckDB stores them, but a seven-digit year
-- cannot even be handed over as a timestamp).
SELECT CASE WHEN year(d) BETWEEN 1 AND 9999 THEN d END AS v,
       ((d IS NOT NULL AND year(d) BETWEEN 1 AND 9999) OR b <> '') AS ok
FROM (SELECT TRY_CAST(CASE WHEN b = '' THEN replace(q, '''''', '''') END AS DATE) AS d, b FROM cells);

-- name: sandbox_decode_double
SELECT TRY_CAST(CASE WHEN b = '' THEN replace(q, '''''', '''') WHEN upper(b) <> 'NULL' THEN b END AS DOUBLE) AS v,
       (v IS NOT NULL OR upper(b) = 'NULL') AS ok
FROM cells;

-- name: sandbox_decode_boolean
SELECT TRY_CAST(CASE WHEN b = '' THEN replace(q, '''''', '''') WHEN upper(b) <> 'NULL' THEN b END AS BOOLEAN) AS v,
       (v IS NOT NULL OR upper(b) = 'NULL') AS ok
FROM cells;

-- name: sandbox_insert_head
INSERT INTO {table} ({columns}) VALUES

-- name: sandbox_staged
SELECT {columns} FROM {table} ORDER BY rowid;

-- name: sandbox_clear
DELETE FROM {table};

-- name: applied_by_sha
SELECT drop_id FROM drop_files WHERE sha256 = ? AND outcome = 'applied' ORDER BY drop_id LIMIT 1;

-- name: drop_by_claim_token
SELECT drop_id, outcome, reason, rows_json, n_revisions, warnings_json, sha256, file_name,
       size_bytes, received_at, processed_at
FROM drop_files WHERE claim_token = ?;

-- name: declared_factors
SELECT factor_id, label, description, frequency, is_traded, is_new, start_date FROM factors;

-- name: declared_assets
SELECT asset_id, label, description, frequency, start_date FROM assets;

-- name: trailing_factor_sd
-- Sample sd and count of the last ? (TRAILING_ROWS) stored returns of each factor in incoming_frame(id).
SELECT factor_id AS id, stddev_samp(ret) AS sd, count(*) AS n
FROM (
    SELECT r.factor_id, r.ret,
           row_number() OVER (PARTITION BY r.factor_id ORDER BY r.date DESC) AS k
    FROM factor_returns r SEMI JOIN incoming_frame i ON r.factor_id = i.id
)
WHERE k <= ?
GROUP BY factor_id;

-- name: trailing_asset_sd
SELECT asset_id AS id, stddev_samp(ret) AS sd, count(*) AS n
FROM (
    SELECT r.asset_id, r.ret,
           row_number() OVER (PARTITION BY r.asset_id ORDER BY r.date DESC) AS k
    FROM asset_returns r SEMI JOIN incoming_frame i ON r.asset_id = i.id
)
WHERE k <= ?
GROUP BY asset_id;

-- name: trailing_factor_sd_recent
-- As trailing_factor_sd, over the rows dated at most ? days before the latest stored date
-- only (a scan of the date column instead of a window over whole histories). A factor
-- with fewer than TRAILING_ROWS rows there is looked up again with trailing_factor_sd.
SELECT factor_id AS id, stddev_samp(ret) AS sd, count(*) AS n
FROM (
    SELECT r.factor_id, r.ret,
           row_number() OVER (PARTITION BY r.factor_id ORDER BY r.date DESC) AS k
    FROM factor_returns r SEMI JOIN incoming_frame i ON r.factor_id = i.id
    WHERE r.date >= (SELECT max(date) FROM factor_returns) - CAST(? AS INTEGER)
)
WHERE k <= ?
GROUP BY factor_id;

-- name: trailing_asset_sd_recent
SELECT asset_id AS id, stddev_samp(ret) AS sd, count(*) AS n
FROM (
    SELECT r.asset_id, r.ret,
           row_number() OVER (PARTITION BY r.asset_id ORDER BY r.date DESC) AS k
    FROM asset_returns r SEMI JOIN incoming_frame i ON r.asset_id = i.id
    WHERE r.date >= (SELECT max(date) FROM asset_returns) - CAST(? AS INTEGER)
)
WHERE k <= ?
GROUP BY asset_id;

-- name: stored_months_factor
-- Stored dates of the given series in the given months: incoming_frame(id, month).
SELECT r.factor_id AS id, r.date
FROM factor_returns r
JOIN incoming_frame i ON r.factor_id = i.id AND date_trunc('month', r.date) = i.month;

-- name: stored_months_asset
SELECT r.asset_id AS id, r.date
FROM asset_returns r
JOIN incoming_frame i ON r.asset_id = i.id AND date_trunc('month', r.date) = i.month;

-- name: stored_months_risk_free
SELECT r.frequency AS id, r.date
FROM risk_free r
JOIN incoming_frame i ON r.frequency = i.id AND date_trunc('month', r.date) = i.month;

-- name: existing_factor_returns
-- Stored values at the keys of incoming_frame(i, id, date): the row number i comes back.
SELECT f.i, r.ret AS old
FROM incoming_frame f JOIN factor_returns r ON r.factor_id = f.id AND r.date = f.date;

-- name: existing_asset_returns
SELECT f.i, r.ret AS old
FROM incoming_frame f JOIN asset_returns r ON r.asset_id = f.id AND r.date = f.date;

-- name: existing_risk_free
SELECT f.i, r.rate AS old
FROM incoming_frame f JOIN risk_free r ON r.frequency = f.id AND r.date = f.date;

-- name: next_drop_id
SELECT nextval('seq_drop_id');

-- name: insert_drop_file
INSERT INTO drop_files (drop_id, sha256, file_name, size_bytes, outcome, reason, rows_json,
                        n_revisions, warnings_json, received_at, claim_token)
VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?);

-- name: insert_factors
INSERT INTO factors (factor_id, label, description, frequency, is_traded, is_new, start_date, declared_by)
SELECT factor_id, label, description, frequency, is_traded, is_new, start_date, ? FROM incoming_frame;

-- name: insert_assets
INSERT INTO assets (asset_id, label, description, frequency, start_date, declared_by)
SELECT asset_id, label, description, frequency, start_date, ? FROM incoming_frame;

-- name: insert_factor_returns
INSERT INTO factor_returns (factor_id, date, ret, drop_id) SELECT id, date, value, ? FROM incoming_frame;

-- name: insert_asset_returns
INSERT INTO asset_returns (asset_id, date, ret, drop_id) SELECT id, date, value, ? FROM incoming_frame;

-- name: insert_risk_free
INSERT INTO risk_free (frequency, date, rate, drop_id) SELECT id, date, value, ? FROM incoming_frame;

-- name: revise_factor_returns
UPDATE factor_returns AS r SET ret = f.value, drop_id = ?
FROM incoming_frame f WHERE r.factor_id = f.id AND r.date = f.date;

-- name: revise_asset_returns
UPDATE asset_returns AS r SET ret = f.value, drop_id = ?
FROM incoming_frame f WHERE r.asset_id = f.id AND r.date = f.date;

-- name: revise_risk_free
UPDATE risk_free AS r SET rate = f.value, drop_id = ?
FROM incoming_frame f WHERE r.frequency = f.id AND r.date = f.date;

-- name: insert_revisions
-- incoming_frame(id, date, old, value): the old value is kept before the new one is written.
INSERT INTO revisions (revision_id, series_kind, series_id, date, old_value, new_value, drop_id)
SELECT nextval('seq_revision_id'), ?, id, date, old, value, ? FROM incoming_frame;

-- name: bump_meta_counter
-- The change markers the UI polls: store_meta 'data_version' and 'drops_version'.
INSERT INTO store_meta (key, value) VALUES (?, '1')
ON CONFLICT (key) DO UPDATE SET value = CAST(CAST(store_meta.value AS BIGINT) + 1 AS VARCHAR)
RETURNING CAST(value AS BIGINT);

-- name: get_meta_counter
SELECT CAST(value AS BIGINT) FROM store_meta WHERE key = ?;
