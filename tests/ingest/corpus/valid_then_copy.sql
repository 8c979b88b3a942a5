INSERT INTO factor_returns VALUES ('MKT', DATE '2026-11-03', 0.0100);
INSERT INTO factor_returns VALUES ('MKT', DATE '2026-11-04', 0.0100);

COPY (SELECT * FROM factor_returns) TO '/tmp/tracker-leak.csv';
