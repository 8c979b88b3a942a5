INSERT INTO factor_returns (SELECT 'MKT', DATE '2026-11-03', 0.01);
