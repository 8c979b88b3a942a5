-- 001: the initial store.
-- Every table a user may read is documented in README.md ("Tables you may query").
-- Data tables keep the drop file that last wrote each row; the old value of a changed
-- row goes to `revisions` before the new one is written.

CREATE TABLE store_meta (
    key   VARCHAR PRIMARY KEY,
    value VARCHAR NOT NULL
);

CREATE SEQUENCE seq_drop_id START 1;
CREATE SEQUENCE seq_fit_id START 1;
CREATE SEQUENCE seq_revision_id START 1;
CREATE SEQUENCE seq_review_id START 1;
CREATE SEQUENCE seq_run_id START 1;

CREATE TABLE factors (
    factor_id    VARCHAR PRIMARY KEY,
    label        VARCHAR NOT NULL,
    description  VARCHAR NOT NULL DEFAULT '',
    frequency    VARCHAR NOT NULL CHECK (frequency IN ('daily', 'monthly')),
    is_traded    BOOLEAN NOT NULL DEFAULT TRUE,   -- a traded excess return (long-short or market minus rf)
    is_new       BOOLEAN NOT NULL DEFAULT FALSE,  -- newly proposed: faces the t > 3.0 hurdle
    start_date   DATE,                            -- no return may be dated before this
    declared_by  BIGINT,                          -- drop_id, NULL for the built-in scenario
    declared_at  TIMESTAMP NOT NULL DEFAULT current_timestamp
);

CREATE TABLE factor_returns (
    factor_id  VARCHAR NOT NULL,
    date       DATE NOT NULL,
    ret        DOUBLE NOT NULL,                   -- decimal simple return for the factor's frequency
    drop_id    BIGINT,
    PRIMARY KEY (factor_id, date)
);

CREATE TABLE assets (
    asset_id     VARCHAR PRIMARY KEY,
    label        VARCHAR NOT NULL,
    description  VARCHAR NOT NULL DEFAULT '',
    frequency    VARCHAR NOT NULL CHECK (frequency IN ('daily', 'monthly')),
    start_date   DATE,
    declared_by  BIGINT,
    declared_at  TIMESTAMP NOT NULL DEFAULT current_timestamp
);

CREATE TABLE asset_returns (
    asset_id  VARCHAR NOT NULL,
    date      DATE NOT NULL,
    ret       DOUBLE NOT NULL,                    -- decimal simple total return (not excess)
    drop_id   BIGINT,
    PRIMARY KEY (asset_id, date)
);

CREATE TABLE risk_free (
    frequency  VARCHAR NOT NULL CHECK (frequency IN ('daily', 'monthly')),
    date       DATE NOT NULL,
    rate       DOUBLE NOT NULL,                   -- decimal simple return over the period ending on date
    drop_id    BIGINT,
    PRIMARY KEY (frequency, date)
);

-- Every drop file ever seen, with its outcome. Files are never deleted: applied ones
-- are moved to applied/, rejected ones to rejected/.
CREATE TABLE drop_files (
    drop_id       BIGINT PRIMARY KEY,
    sha256        VARCHAR NOT NULL,
    file_name     VARCHAR NOT NULL,
    size_bytes    BIGINT NOT NULL,
    outcome       VARCHAR NOT NULL CHECK (outcome IN ('applied', 'rejected', 'duplicate')),
    reason        VARCHAR,                        -- rejection: statement, line and rule
    rows_json     VARCHAR NOT NULL DEFAULT '{}',  -- rows written per table
    n_revisions   INTEGER NOT NULL DEFAULT 0,
    warnings_json VARCHAR NOT NULL DEFAULT '[]',
    received_at   TIMESTAMP NOT NULL,
    processed_at  TIMESTAMP NOT NULL DEFAULT current_timestamp
);

-- Old values of revised rows. series_kind is 'factor', 'asset' or 'risk_free'.
CREATE TABLE revisions (
    revision_id  BIGINT PRIMARY KEY,
    series_kind  VARCHAR NOT NULL,
    series_id    VARCHAR NOT NULL,
    date         DATE NOT NULL,
    old_value    DOUBLE NOT NULL,
    new_value    DOUBLE NOT NULL,
    drop_id      BIGINT NOT NULL,
    revised_at   TIMESTAMP NOT NULL DEFAULT current_timestamp
);

-- Model fits. subject_id is a factor id, an asset id or '*market*'.
CREATE TABLE model_fits (
    fit_id        BIGINT PRIMARY KEY,
    subject_id    VARCHAR NOT NULL,
    model         VARCHAR NOT NULL,               -- e.g. 'premium', 'regimes', 'regime_premium', 'market'
    status        VARCHAR NOT NULL,               -- ok, not_converged, unidentified, too_little_data, failed
    message       VARCHAR NOT NULL DEFAULT '',
    params_json   VARCHAR NOT NULL DEFAULT '{}',
    loglik        DOUBLE,
    n_obs         INTEGER NOT NULL DEFAULT 0,
    converged     BOOLEAN NOT NULL DEFAULT FALSE,
    data_from     DATE,
    data_through  DATE,
    reason        VARCHAR NOT NULL DEFAULT '',    -- why it was refit: initial, schedule, request, revision, drift
    fitted_at     TIMESTAMP NOT NULL DEFAULT current_timestamp,
    is_current    BOOLEAN NOT NULL DEFAULT TRUE
);

-- The saved end state of each filter, so new rows advance it without re-reading history.
CREATE TABLE filter_states (
    subject_id    VARCHAR NOT NULL,
    model         VARCHAR NOT NULL,
    fit_id        BIGINT NOT NULL,
    through_date  DATE NOT NULL,
    state_json    VARCHAR NOT NULL,
    updated_at    TIMESTAMP NOT NULL DEFAULT current_timestamp,
    PRIMARY KEY (subject_id, model)
);

-- Real-time premium estimates: what was known on `date` using data up to `date`.
-- Rows are never updated. A revision supersedes the rows from the revised date on
-- (superseded_at set) and writes a new vintage.
CREATE TABLE premium_estimates (
    factor_id       VARCHAR NOT NULL,
    date            DATE NOT NULL,
    vintage         INTEGER NOT NULL,
    fit_id          BIGINT,
    premium         DOUBLE,                       -- filtered mu_{t|t}, per period, decimal
    premium_sd      DOUBLE,
    premium_ann     DOUBLE,
    premium_ann_sd  DOUBLE,
    regime_premium      DOUBLE,                   -- the regime-aware (Kim filter) premium, per period
    regime_premium_sd   DOUBLE,
    vol_forecast    DOUBLE,                       -- sqrt(h_{t+1}), per period
    sharpe_ann      DOUBLE,                       -- premium_ann / annualised vol forecast
    snr             DOUBLE,                       -- q / (c h_t)
    std_error       DOUBLE,                       -- standardized one-step prediction error of f_t
    loglik_t        DOUBLE,
    computed_at     TIMESTAMP NOT NULL DEFAULT current_timestamp,
    superseded_at   TIMESTAMP,
    PRIMARY KEY (factor_id, date, vintage)
);

-- Real-time regime probabilities for each factor and for the market ('*market*').
CREATE TABLE regime_estimates (
    subject_id     VARCHAR NOT NULL,
    date           DATE NOT NULL,
    vintage        INTEGER NOT NULL,
    fit_id         BIGINT,
    n_regimes      INTEGER NOT NULL,
    regime         INTEGER,                       -- most probable filtered regime, 0 = calmest
    probability    DOUBLE,                        -- its filtered probability
    filtered       DOUBLE[],                      -- P(S_t = k | data to t), k = 0..K-1
    predicted      DOUBLE[],                      -- P(S_t+1 = k | data to t)
    computed_at    TIMESTAMP NOT NULL DEFAULT current_timestamp,
    superseded_at  TIMESTAMP,
    PRIMARY KEY (subject_id, date, vintage)
);

-- Warnings per subject per date, stored with the estimates they judge.
CREATE TABLE warnings (
    subject_id     VARCHAR NOT NULL,
    date           DATE NOT NULL,
    vintage        INTEGER NOT NULL,
    code           VARCHAR NOT NULL,
    severity       VARCHAR NOT NULL,
    message        VARCHAR NOT NULL,
    detail         VARCHAR NOT NULL DEFAULT '',
    value          DOUBLE,
    threshold      DOUBLE,
    source         VARCHAR NOT NULL,
    computed_at    TIMESTAMP NOT NULL DEFAULT current_timestamp,
    superseded_at  TIMESTAMP,
    PRIMARY KEY (subject_id, date, vintage, code)
);

-- Each estimation run (refit or filter advance), for the header and the audit trail.
CREATE TABLE estimation_runs (
    run_id        BIGINT PRIMARY KEY,
    kind          VARCHAR NOT NULL,               -- backfill, advance, refit, rederive
    reason        VARCHAR NOT NULL DEFAULT '',
    subjects      VARCHAR NOT NULL DEFAULT '',
    from_date     DATE,
    through_date  DATE,
    started_at    TIMESTAMP NOT NULL,
    finished_at   TIMESTAMP NOT NULL DEFAULT current_timestamp,
    status        VARCHAR NOT NULL DEFAULT 'ok',
    message       VARCHAR NOT NULL DEFAULT ''
);

-- "Mark reviewed": when, by whom, and a snapshot of the board at that moment.
CREATE TABLE reviews (
    review_id      BIGINT PRIMARY KEY,
    reviewer       VARCHAR NOT NULL,
    reviewed_at    TIMESTAMP NOT NULL DEFAULT current_timestamp,
    snapshot_json  VARCHAR NOT NULL
);

-- The invented demo scenario's truth, kept apart from every estimate.
CREATE TABLE truth_premia (
    factor_id  VARCHAR NOT NULL,
    date       DATE NOT NULL,
    premium    DOUBLE NOT NULL,                   -- true expected excess return, per day
    PRIMARY KEY (factor_id, date)
);

CREATE TABLE truth_regimes (
    date    DATE PRIMARY KEY,
    regime  INTEGER NOT NULL                      -- 0 calm, 1 choppy, 2 stressed
);

CREATE TABLE truth_exposures (
    asset_id   VARCHAR NOT NULL,
    factor_id  VARCHAR NOT NULL,
    beta       DOUBLE NOT NULL,
    PRIMARY KEY (asset_id, factor_id)
);
