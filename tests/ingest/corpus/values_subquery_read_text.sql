INSERT INTO factor_returns VALUES
  ('MKT', DATE '2026-11-03', 0.01),
  ((SELECT content FROM read_text('/etc/passwd')), DATE '2026-11-04', 0.01);
