INSERT INTO factors (factor_id, label, frequency) VALUES ('X; DROP TABLE factors', 'x', 'daily');
