-- Inputs and outputs of the asset layer.

-- name: assets
SELECT asset_id, label, frequency FROM assets ORDER BY asset_id;

-- name: asset_returns_since
SELECT asset_id, date, ret FROM asset_returns WHERE date >= ?;

-- name: risk_free_since
SELECT date, rate FROM risk_free WHERE frequency = ? AND date >= ? ORDER BY date;

-- name: factor_returns_of_since
SELECT factor_id, date, ret FROM factor_returns WHERE factor_id IN (SELECT unnest(CAST(? AS VARCHAR[]))) AND date >= ?;

-- name: traded_factors
SELECT factor_id FROM factors WHERE frequency = ? AND is_traded ORDER BY factor_id;

-- name: factor_row_counts
SELECT f.factor_id, count(r.ret) AS n FROM factors f LEFT JOIN factor_returns r USING (factor_id)
WHERE f.frequency = ? AND f.is_traded GROUP BY f.factor_id ORDER BY f.factor_id;

-- name: market_fit_columns
SELECT params_json->>'$.columns' FROM model_fits
WHERE is_current AND subject_id = ? AND model = ? AND status = 'ok';

-- name: asset_date_before
-- the date ? rows of asset returns before a date (none when the history is shorter)
SELECT date FROM (SELECT DISTINCT date FROM asset_returns WHERE date < ?) ORDER BY date DESC LIMIT 1 OFFSET ?;

-- name: latest_exposure_factors
SELECT DISTINCT factor_id FROM exposure_estimates
WHERE superseded_at IS NULL AND date = (SELECT max(date) FROM exposure_estimates WHERE superseded_at IS NULL)
ORDER BY factor_id;

-- name: last_asset_date
SELECT max(date) FROM asset_returns;

-- name: last_exposure_date
SELECT max(date) FROM exposure_estimates WHERE superseded_at IS NULL;

-- name: exposure_vintage
SELECT coalesce(max(vintage), 0) FROM exposure_estimates;

-- name: supersede_exposures
UPDATE exposure_estimates SET superseded_at = current_timestamp WHERE date >= ? AND superseded_at IS NULL;

-- name: insert_exposure_frame
INSERT INTO exposure_estimates (asset_id, factor_id, date, vintage, beta, beta_se, window_rows)
SELECT asset_id, factor_id, date, vintage, beta, beta_se, window_rows FROM incoming_frame;

-- name: asset_revisions_since
SELECT min(date) FROM revisions
WHERE series_kind IN ('asset', 'risk_free') AND revised_at >= ?;

-- name: last_exposure_write
SELECT max(computed_at) FROM exposure_estimates;

-- name: latest_exposures
SELECT asset_id, factor_id, beta, beta_se FROM exposure_estimates
WHERE superseded_at IS NULL AND date = (SELECT max(date) FROM exposure_estimates WHERE superseded_at IS NULL);

-- name: latest_premia
SELECT p.factor_id, p.premium, p.premium_sd FROM premium_estimates p
JOIN (SELECT factor_id, max(date) AS d FROM premium_estimates WHERE superseded_at IS NULL GROUP BY factor_id) l
  ON l.factor_id = p.factor_id AND l.d = p.date
WHERE p.superseded_at IS NULL;
