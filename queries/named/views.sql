-- Read-only queries behind the board, the factor detail, the inbox view and the report.

-- name: board
-- One row per factor: latest current estimate, its regime and warning codes.
WITH last_p AS (
    SELECT p.* FROM premium_estimates p
    JOIN (SELECT factor_id, max(date) AS d FROM premium_estimates WHERE superseded_at IS NULL GROUP BY factor_id) l
      ON l.factor_id = p.factor_id AND l.d = p.date
    WHERE p.superseded_at IS NULL
), last_r AS (
    SELECT r.* FROM regime_estimates r
    JOIN (SELECT subject_id, max(date) AS d FROM regime_estimates WHERE superseded_at IS NULL GROUP BY subject_id) l
      ON l.subject_id = r.subject_id AND l.d = r.date
    WHERE r.superseded_at IS NULL
), codes AS (
    SELECT w.subject_id, string_agg(w.code, ' ' ORDER BY CASE w.severity WHEN 'alert' THEN 0 WHEN 'caution' THEN 1 ELSE 2 END, w.code) AS codes,
           max(CASE w.severity WHEN 'alert' THEN 3 WHEN 'caution' THEN 2 ELSE 1 END) AS worst
    FROM warnings w JOIN last_p p ON p.factor_id = w.subject_id AND p.date = w.date
    WHERE w.superseded_at IS NULL GROUP BY w.subject_id
), data AS (
    SELECT factor_id, count(*) AS n_obs, max(date) AS last_date FROM factor_returns GROUP BY factor_id
), fit AS (
    SELECT subject_id, status AS fit_status, message AS fit_message FROM model_fits
    WHERE is_current AND model = 'premium'
)
SELECT f.factor_id, f.label, f.frequency, f.is_new, d.n_obs, d.last_date,
       p.date AS estimate_date, p.premium, p.premium_sd, p.premium_ann, p.premium_ann_sd,
       p.regime_premium, p.regime_premium_sd, p.sharpe_ann, p.vol_forecast, p.snr,
       r.regime, r.probability AS regime_prob, r.n_regimes, r.filtered AS regime_probs,
       coalesce(c.codes, '') AS codes, coalesce(c.worst, 0) AS worst,
       coalesce(fit.fit_status, 'not estimated') AS fit_status, coalesce(fit.fit_message, '') AS fit_message
FROM factors f
LEFT JOIN data d USING (factor_id)
LEFT JOIN last_p p USING (factor_id)
LEFT JOIN last_r r ON r.subject_id = f.factor_id
LEFT JOIN codes c ON c.subject_id = f.factor_id
LEFT JOIN fit ON fit.subject_id = f.factor_id
ORDER BY f.factor_id;

-- name: market_latest
SELECT date, regime, probability, n_regimes, filtered, predicted FROM regime_estimates
WHERE subject_id = '*market*' AND superseded_at IS NULL ORDER BY date DESC LIMIT 1;

-- name: market_fit
SELECT status, message, params_json, loglik, n_obs, fitted_at FROM model_fits
WHERE subject_id = '*market*' AND is_current;

-- name: premium_path
SELECT date, premium, premium_sd, regime_premium, regime_premium_sd, sharpe_ann, vol_forecast
FROM premium_estimates WHERE factor_id = ? AND superseded_at IS NULL AND date >= ? ORDER BY date;

-- name: returns_path
SELECT date, ret FROM factor_returns WHERE factor_id = ? AND date >= ? ORDER BY date;

-- name: regime_path
SELECT date, regime, probability, filtered FROM regime_estimates
WHERE subject_id = ? AND superseded_at IS NULL AND date >= ? ORDER BY date;

-- name: factor_fits
SELECT model, status, message, params_json, loglik, n_obs, converged, data_from, data_through, reason, fitted_at
FROM model_fits WHERE subject_id = ? AND is_current ORDER BY model;

-- name: factor_warnings_latest
SELECT w.code, w.severity, w.message, w.detail, w.value, w.threshold, w.source, w.date
FROM warnings w
WHERE w.subject_id = ? AND w.superseded_at IS NULL
  AND w.date = (SELECT max(date) FROM premium_estimates WHERE factor_id = ? AND superseded_at IS NULL)
ORDER BY CASE w.severity WHEN 'alert' THEN 0 WHEN 'caution' THEN 1 ELSE 2 END, w.code;

-- name: factor_warning_history
-- When each warning code first appeared in its current spell and how long it has lasted.
SELECT code, min(date) AS first_date, max(date) AS last_date, count(*) AS n_days
FROM warnings WHERE subject_id = ? AND superseded_at IS NULL AND date >= ?
GROUP BY code ORDER BY code;

-- name: factor_meta
SELECT factor_id, label, description, frequency, is_traded, is_new, start_date FROM factors WHERE factor_id = ?;

-- name: recent_drops
SELECT drop_id, file_name, outcome, reason, rows_json, n_revisions, warnings_json, received_at, processed_at
FROM drop_files ORDER BY drop_id DESC LIMIT ?;

-- name: revisions_since
SELECT series_kind, series_id, date, old_value, new_value, drop_id, revised_at
FROM revisions WHERE revised_at > ? ORDER BY revised_at DESC;

-- name: last_review
SELECT review_id, reviewer, reviewed_at, snapshot_json FROM reviews ORDER BY reviewed_at DESC LIMIT 1;

-- name: insert_review
INSERT INTO reviews (review_id, reviewer, reviewed_at, snapshot_json)
VALUES (nextval('seq_review_id'), ?, current_timestamp, ?);

-- name: version
SELECT key, value FROM store_meta WHERE key IN ('estimates_version', 'data_version');
