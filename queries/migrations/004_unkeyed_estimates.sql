-- 004: the estimate tables lose their PRIMARY KEY indexes.
--
-- They are append-only vintages written by the estimation service alone, which never
-- writes a (subject, date, vintage[, code]) twice (tests/service check it). An ART index
-- over millions of rows made every short write connection pay to load it on the first
-- insert and to rewrite it at the checkpoint when the connection closed: about 0.14 s per
-- table per update at 500 factors x 6,500 days, most of a one-day update. Reads filter
-- by subject and date ranges, which DuckDB's zone maps serve without the index.
-- factor_returns, asset_returns and the other tables keep their keys: the ingest relies
-- on them.

CREATE TABLE premium_estimates_unkeyed (
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
    superseded_at   TIMESTAMP
);
INSERT INTO premium_estimates_unkeyed SELECT * FROM premium_estimates;
DROP TABLE premium_estimates;
ALTER TABLE premium_estimates_unkeyed RENAME TO premium_estimates;

CREATE TABLE regime_estimates_unkeyed (
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
    superseded_at  TIMESTAMP
);
INSERT INTO regime_estimates_unkeyed SELECT * FROM regime_estimates;
DROP TABLE regime_estimates;
ALTER TABLE regime_estimates_unkeyed RENAME TO regime_estimates;

CREATE TABLE warnings_unkeyed (
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
    superseded_at  TIMESTAMP
);
INSERT INTO warnings_unkeyed SELECT * FROM warnings;
DROP TABLE warnings;
ALTER TABLE warnings_unkeyed RENAME TO warnings;

CREATE TABLE exposure_estimates_unkeyed (
    asset_id       VARCHAR NOT NULL,
    factor_id      VARCHAR NOT NULL,           -- '*alpha*' holds the intercept
    date           DATE NOT NULL,
    vintage        INTEGER NOT NULL,
    beta           DOUBLE,
    beta_se        DOUBLE,
    window_rows    INTEGER NOT NULL,
    computed_at    TIMESTAMP NOT NULL DEFAULT current_timestamp,
    superseded_at  TIMESTAMP
);
INSERT INTO exposure_estimates_unkeyed SELECT * FROM exposure_estimates;
DROP TABLE exposure_estimates;
ALTER TABLE exposure_estimates_unkeyed RENAME TO exposure_estimates;
