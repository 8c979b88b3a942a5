-- 003: real-time asset exposures (rolling-window OLS with Newey-West errors).
-- Like the premia, rows are never updated: a revision supersedes them and writes a new vintage.

CREATE TABLE exposure_estimates (
    asset_id       VARCHAR NOT NULL,
    factor_id      VARCHAR NOT NULL,           -- '*alpha*' holds the intercept
    date           DATE NOT NULL,
    vintage        INTEGER NOT NULL,
    beta           DOUBLE,
    beta_se        DOUBLE,
    window_rows    INTEGER NOT NULL,
    computed_at    TIMESTAMP NOT NULL DEFAULT current_timestamp,
    superseded_at  TIMESTAMP,
    PRIMARY KEY (asset_id, factor_id, date, vintage)
);
