-- Bulk loads of the demo scenario from a registered DataFrame named incoming_frame.

-- name: factors
INSERT INTO factors (factor_id, label, description, frequency, is_traded, is_new, start_date)
SELECT factor_id, label, description, frequency, is_traded, is_new, start_date FROM incoming_frame;

-- name: assets
INSERT INTO assets (asset_id, label, description, frequency, start_date)
SELECT asset_id, label, description, frequency, start_date FROM incoming_frame;

-- name: factor_returns
INSERT INTO factor_returns (factor_id, date, ret) SELECT factor_id, date, ret FROM incoming_frame;

-- name: asset_returns
INSERT INTO asset_returns (asset_id, date, ret) SELECT asset_id, date, ret FROM incoming_frame;

-- name: risk_free
INSERT INTO risk_free (frequency, date, rate) SELECT frequency, date, rate FROM incoming_frame;

-- name: truth_premia
INSERT INTO truth_premia (factor_id, date, premium) SELECT factor_id, date, premium FROM incoming_frame;

-- name: truth_regimes
INSERT INTO truth_regimes (date, regime) SELECT date, regime FROM incoming_frame;

-- name: truth_exposures
INSERT INTO truth_exposures (asset_id, factor_id, beta) SELECT asset_id, factor_id, beta FROM incoming_frame;
