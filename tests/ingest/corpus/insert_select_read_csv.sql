INSERT INTO factor_returns
SELECT * FROM read_csv('/etc/passwd');
