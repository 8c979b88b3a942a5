-- Inputs and outputs of the asset layer.

-- name: assets
SELECT asset_id, label, frequency FROM assets ORDER BY asset_id;

-- name: asset_returns
SELECT asset_id, date, ret FROM asset_returns ORDER BY asset_id, date;

-- name: risk_free
SELECT date, rate FROM risk_free WHERE frequency = ? ORDER BY date;

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
