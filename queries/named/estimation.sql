-- Inputs and outputs of the estimation service.

-- name: factors
SELECT factor_id, label, frequency, is_traded, is_new, start_date FROM factors ORDER BY factor_id;

-- name: factor_returns_all
SELECT factor_id, date, ret FROM factor_returns ORDER BY factor_id, date;

-- name: factor_returns_for
SELECT factor_id, date, ret FROM factor_returns WHERE factor_id = ? ORDER BY date;

-- name: factor_returns_after
-- New rows for one factor after its filter state's date.
SELECT date, ret FROM factor_returns WHERE factor_id = ? AND date > ? ORDER BY date;

-- name: last_dates
SELECT factor_id, max(date) AS last_date, count(*) AS n_obs FROM factor_returns GROUP BY factor_id;

-- name: filter_states
SELECT subject_id, model, fit_id, through_date, state_json FROM filter_states;

-- name: upsert_filter_state
INSERT OR REPLACE INTO filter_states (subject_id, model, fit_id, through_date, state_json, updated_at)
VALUES (?, ?, ?, ?, ?, ?);

-- name: next_fit_id
SELECT nextval('seq_fit_id');

-- name: next_run_id
SELECT nextval('seq_run_id');

-- name: retire_fits
UPDATE model_fits SET is_current = FALSE WHERE subject_id = ? AND model = ? AND is_current;

-- name: insert_fit
INSERT INTO model_fits (fit_id, subject_id, model, status, message, params_json, loglik, n_obs,
                        converged, data_from, data_through, reason, is_current)
VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, TRUE);

-- name: next_fit_ids
-- ? ids at once (a refit's new fits, written together)
SELECT nextval('seq_fit_id') AS fit_id FROM range(?);

-- name: retire_fits_frame
-- The fits that incoming_frame's (subject, model) pairs replace; insert_fit_frame then adds them.
UPDATE model_fits AS f SET is_current = FALSE
FROM incoming_frame AS i
WHERE f.subject_id = i.subject_id AND f.model = i.model AND f.is_current;

-- name: insert_fit_frame
INSERT INTO model_fits (fit_id, subject_id, model, status, message, params_json, loglik, n_obs,
                        converged, data_from, data_through, reason, is_current)
SELECT fit_id, subject_id, model, status, message, params_json, loglik, n_obs, converged,
       data_from, data_through, reason, TRUE
FROM incoming_frame;

-- name: current_fits
SELECT fit_id, subject_id, model, status, message, params_json, loglik, n_obs, converged,
       data_from, data_through, reason, fitted_at
FROM model_fits WHERE is_current ORDER BY subject_id, model;

-- name: last_estimate_dates
SELECT factor_id, max(date) AS last_date FROM premium_estimates WHERE superseded_at IS NULL GROUP BY factor_id;

-- name: supersede_premium
UPDATE premium_estimates SET superseded_at = current_timestamp
WHERE factor_id = ? AND date >= ? AND superseded_at IS NULL;

-- name: supersede_regime
UPDATE regime_estimates SET superseded_at = current_timestamp
WHERE subject_id = ? AND date >= ? AND superseded_at IS NULL;

-- name: supersede_warnings
UPDATE warnings SET superseded_at = current_timestamp
WHERE subject_id = ? AND date >= ? AND superseded_at IS NULL;

-- name: insert_premium_frame
INSERT INTO premium_estimates (factor_id, date, vintage, fit_id, premium, premium_sd, premium_ann,
    premium_ann_sd, regime_premium, regime_premium_sd, vol_forecast, sharpe_ann, snr, std_error, loglik_t)
SELECT factor_id, date, vintage, fit_id, premium, premium_sd, premium_ann, premium_ann_sd,
    regime_premium, regime_premium_sd, vol_forecast, sharpe_ann, snr, std_error, loglik_t
FROM incoming_frame;

-- name: insert_regime_frame
INSERT INTO regime_estimates (subject_id, date, vintage, fit_id, n_regimes, regime, probability, filtered, predicted)
SELECT subject_id, date, vintage, fit_id, n_regimes, regime, probability, filtered, predicted FROM incoming_frame;

-- name: insert_warning_frame
INSERT INTO warnings (subject_id, date, vintage, code, severity, message, detail, value, threshold, source)
SELECT subject_id, date, vintage, code, severity, message, detail, value, threshold, source FROM incoming_frame;

-- name: insert_run
INSERT INTO estimation_runs (run_id, kind, reason, subjects, from_date, through_date, started_at, status, message)
VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?);

-- name: bump_version
INSERT OR REPLACE INTO store_meta (key, value)
SELECT 'estimates_version', CAST(coalesce(max(CAST(value AS BIGINT)), 0) + 1 AS VARCHAR)
FROM store_meta WHERE key = 'estimates_version';

-- name: pending_revisions
-- Factor revisions recorded after the factor's filter state was last written.
SELECT r.series_id AS factor_id, min(r.date) AS first_date, count(*) AS n
FROM revisions r
JOIN filter_states s ON s.subject_id = r.series_id AND s.model = 'premium'
WHERE r.series_kind = 'factor' AND r.revised_at >= s.updated_at
GROUP BY r.series_id;

-- name: recent_revision_counts
SELECT series_id AS factor_id, count(*) AS n FROM revisions
WHERE series_kind = 'factor' AND revised_at >= ? GROUP BY series_id;

-- name: current_premium_history
SELECT factor_id, date, premium, premium_sd, std_error, loglik_t
FROM premium_estimates WHERE superseded_at IS NULL AND factor_id = ? ORDER BY date;

-- name: current_regime_history
SELECT date, filtered FROM regime_estimates
WHERE superseded_at IS NULL AND subject_id = ? ORDER BY date;

-- name: state_stamps
SELECT subject_id, model, through_date, updated_at FROM filter_states;

-- Reads of the incremental path: counts instead of whole histories, and only the rows
-- each update needs (the whole history only for fits, re-derivations and fallbacks).

-- name: factor_variances
-- Sample variance of each named factor's stored returns (choosing the market regime's factors).
SELECT factor_id, var_samp(ret) FROM factor_returns
WHERE factor_id IN (SELECT unnest(CAST(? AS VARCHAR[]))) GROUP BY factor_id;

-- name: factor_returns_of
SELECT factor_id, date, ret FROM factor_returns
WHERE factor_id IN (SELECT unnest(CAST(? AS VARCHAR[]))) ORDER BY factor_id, date;

-- name: factor_returns_after_states
-- Rows after each factor's premium filter state.
SELECT r.factor_id, r.date, r.ret FROM factor_returns r
JOIN filter_states s ON s.subject_id = r.factor_id AND s.model = 'premium'
WHERE r.date > s.through_date ORDER BY r.factor_id, r.date;

-- name: factor_returns_of_after
SELECT factor_id, date, ret FROM factor_returns
WHERE factor_id IN (SELECT unnest(CAST(? AS VARCHAR[]))) AND date > ? ORDER BY factor_id, date;

-- name: update_filter_state_frame
-- The states of incoming_frame's subjects that have one; insert_new_filter_state_frame
-- then adds the others. An update in place: INSERT OR REPLACE deletes and re-inserts
-- every row (measured at 500 factors x 12 KB: 0.010-0.02 s here, 0.02-0.03 s replaced).
UPDATE filter_states AS f
SET fit_id = i.fit_id, through_date = i.through_date, state_json = i.state_json, updated_at = i.updated_at
FROM incoming_frame AS i
WHERE f.subject_id = i.subject_id AND f.model = i.model;

-- name: insert_new_filter_state_frame
INSERT INTO filter_states (subject_id, model, fit_id, through_date, state_json, updated_at)
SELECT i.subject_id, i.model, i.fit_id, i.through_date, i.state_json, i.updated_at
FROM incoming_frame AS i ANTI JOIN filter_states AS f ON f.subject_id = i.subject_id AND f.model = i.model;

-- name: insert_run_frame
INSERT INTO estimation_runs (run_id, kind, reason, subjects, from_date, through_date, started_at, status, message)
SELECT nextval('seq_run_id'), kind, reason, subjects, from_date, through_date, started_at, status, message
FROM incoming_frame;

-- Reads of a day's update that do not grow with the history: each premium filter state
-- keeps a book of its factor's row counts, vintage and latest codes (see estimate_io),
-- and only the rows since that book are counted. The *_of queries (whole histories of the
-- named factors) run for factors without a book, on a refit request (every factor: the
-- books are checked against them) and where a drop wrote on or before a book's date.

-- name: drop_seen
-- The newest drop id: every drop applied later has a larger one (ids come from a sequence,
-- drawn inside the applying transaction, and connections to the store are exclusive).
SELECT coalesce(max(drop_id), 0) FROM drop_files;

-- name: rows_since_books
-- Per booked factor, incoming_frame(factor_id, through_date, drop_seen): the rows after its
-- book's date, and the rows dated on or before it written by a later drop (revised or
-- inserted). The constant bounds (? = earliest book date, ? = smallest drop id seen) let the
-- scan skip most rows before the join.
SELECT r.factor_id,
       count(*) FILTER (WHERE r.date > b.through_date) AS n_after,
       count(*) FILTER (WHERE r.date > b.through_date AND isfinite(r.ret)) AS n_after_finite,
       max(r.date) FILTER (WHERE r.date > b.through_date) AS last_after,
       max(r.date) FILTER (WHERE r.date > b.through_date AND isfinite(r.ret)) AS last_finite_after,
       count(*) FILTER (WHERE r.date <= b.through_date AND r.drop_id > b.drop_seen) AS n_back
FROM factor_returns r JOIN incoming_frame b USING (factor_id)
WHERE (r.date > CAST(? AS DATE) OR r.drop_id > CAST(? AS BIGINT))
GROUP BY r.factor_id;

-- name: row_counts_of
-- Per named factor: rows, finite rows, first and last date, last finite date.
SELECT factor_id, count(*) AS n_rows, count(*) FILTER (WHERE isfinite(ret)) AS n_finite,
       min(date) AS first_date, max(date) AS last_date,
       max(date) FILTER (WHERE isfinite(ret)) AS last_finite_date
FROM factor_returns WHERE factor_id IN (SELECT unnest(CAST(? AS VARCHAR[]))) GROUP BY factor_id;

-- name: current_vintage_of
-- Current vintage of the named factors (? premium) and regime subjects (?).
SELECT subject_id, max(vintage) AS vintage FROM (
    SELECT factor_id AS subject_id, vintage FROM premium_estimates
    WHERE factor_id IN (SELECT unnest(CAST(? AS VARCHAR[])))
    UNION ALL SELECT subject_id, vintage FROM regime_estimates
    WHERE subject_id IN (SELECT unnest(CAST(? AS VARCHAR[])))
) GROUP BY subject_id;

-- name: latest_warning_codes_of
-- Codes in force at each named factor's latest estimated date.
SELECT w.subject_id, list(w.code) AS codes
FROM warnings w
JOIN (SELECT factor_id, max(date) AS d FROM premium_estimates
      WHERE superseded_at IS NULL AND factor_id IN (SELECT unnest(CAST(? AS VARCHAR[])))
      GROUP BY factor_id) l
  ON l.factor_id = w.subject_id AND l.d = w.date
WHERE w.superseded_at IS NULL
GROUP BY w.subject_id;

-- name: rows_after_state_of
-- Per named factor with a premium filter state: rows after the state's date and rows after
-- the current premium fit's data (only rows after the earlier of the two are counted).
WITH bounds AS (
    SELECT s.subject_id AS factor_id, s.through_date,
           coalesce(f.data_through, s.through_date) AS fit_through
    FROM filter_states s
    LEFT JOIN (SELECT subject_id, max(data_through) AS data_through FROM model_fits
               WHERE model = 'premium' AND is_current GROUP BY subject_id) f ON f.subject_id = s.subject_id
    WHERE s.model = 'premium' AND s.subject_id IN (SELECT unnest(CAST(? AS VARCHAR[])))
)
SELECT r.factor_id, count(*) FILTER (WHERE r.date > b.through_date) AS n_after,
       count(*) FILTER (WHERE r.date > b.fit_through) AS since_fit
FROM factor_returns r JOIN bounds b USING (factor_id)
WHERE r.date > least(b.through_date, b.fit_through)
GROUP BY r.factor_id;
