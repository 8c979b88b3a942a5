INSERT INTO factor_returns VALUES ('MKT', current_date, 0.01);
