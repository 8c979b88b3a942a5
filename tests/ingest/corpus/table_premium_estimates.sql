INSERT INTO premium_estimates (factor_id, date, vintage) VALUES ('MKT', DATE '2026-11-03', 1);
