INSERT INTO factor_returns (factor_id, ret) VALUES ('MKT', 0.01);
