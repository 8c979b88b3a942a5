INSERT INTO factor_returns (factor_id, date, ret, ret) VALUES ('MKT', DATE '2026-11-03', 0.01, 0.02);
