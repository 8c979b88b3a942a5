-- 005: filter_states.state_json is stored without compression.
--
-- Every update replaces the state of each factor it touched (about 12 KB of JSON a
-- factor, most of it base64 floats that do not compress), and the checkpoint when the
-- write connection closes analysed and recompressed the whole column: 0.15-0.18 s of a
-- 500-factor day (measured on duckdb 2.0.1; 0.03-0.05 s uncompressed). The column holds
-- one row per subject and model, so storing it plainly costs a few MB at most.

CREATE TABLE filter_states_plain (
    subject_id    VARCHAR NOT NULL,
    model         VARCHAR NOT NULL,
    fit_id        BIGINT NOT NULL,
    through_date  DATE NOT NULL,
    state_json    VARCHAR USING COMPRESSION uncompressed NOT NULL,
    updated_at    TIMESTAMP NOT NULL DEFAULT current_timestamp,
    PRIMARY KEY (subject_id, model)
);
INSERT INTO filter_states_plain SELECT * FROM filter_states;
DROP TABLE filter_states;
ALTER TABLE filter_states_plain RENAME TO filter_states;
