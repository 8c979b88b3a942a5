INSERT INTO factor_returns VALUES ("factor_id", DATE '2026-11-03', 0.01);
