-- Queries behind `tracker status`, the UI header and the first board.

-- name: table_counts
SELECT 'factors' AS table_name, count(*) AS n FROM factors
UNION ALL SELECT 'factor_returns', count(*) FROM factor_returns
UNION ALL SELECT 'assets', count(*) FROM assets
UNION ALL SELECT 'asset_returns', count(*) FROM asset_returns
UNION ALL SELECT 'risk_free', count(*) FROM risk_free
UNION ALL SELECT 'drop_files', count(*) FROM drop_files
UNION ALL SELECT 'revisions', count(*) FROM revisions
UNION ALL SELECT 'model_fits', count(*) FROM model_fits
UNION ALL SELECT 'premium_estimates', count(*) FROM premium_estimates
UNION ALL SELECT 'regime_estimates', count(*) FROM regime_estimates
UNION ALL SELECT 'warnings', count(*) FROM warnings;

-- name: date_range
SELECT min(date) AS first_date, max(date) AS last_date FROM factor_returns;

-- name: last_fit
SELECT max(fitted_at) AS last_fit FROM model_fits;

-- name: last_run
SELECT max(finished_at) AS last_run FROM estimation_runs;

-- name: drop_outcomes
SELECT outcome, count(*) AS n FROM drop_files GROUP BY outcome ORDER BY outcome;

-- name: factor_summary
-- One row per factor: descriptive statistics of the stored history (per period, decimal).
SELECT
    f.factor_id, f.label, f.frequency, f.is_traded, f.is_new,
    count(r.ret) AS n_obs,
    min(r.date) AS first_date,
    max(r.date) AS last_date,
    avg(r.ret) AS mean_ret,
    stddev_samp(r.ret) AS sd_ret
FROM factors f
LEFT JOIN factor_returns r USING (factor_id)
GROUP BY ALL
ORDER BY f.factor_id;

-- name: get_meta
SELECT value FROM store_meta WHERE key = ?;

-- name: set_meta
INSERT OR REPLACE INTO store_meta (key, value) VALUES (?, ?);
