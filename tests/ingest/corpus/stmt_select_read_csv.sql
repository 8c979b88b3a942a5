SELECT * FROM read_csv('/etc/passwd');
