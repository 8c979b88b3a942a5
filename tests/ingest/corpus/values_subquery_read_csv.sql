INSERT INTO factor_returns VALUES ('MKT', DATE '2026-11-03',
  (SELECT count(*) FROM read_csv('/etc/passwd')));
