-- a valid first statement does not make the file acceptable
INSERT INTO factor_returns VALUES ('MKT', DATE '2026-11-03', 0.0100);
DROP TABLE factor_returns;
