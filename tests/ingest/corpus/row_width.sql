INSERT INTO factor_returns VALUES ('MKT', DATE '2026-11-03');
