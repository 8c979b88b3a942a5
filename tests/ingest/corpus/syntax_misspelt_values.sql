INSERT INTO factor_returns VALUS ('MKT', DATE '2026-11-03', 0.01);
