INSERT INTO factors VALUES (getenv('HOME'), 'x', '', 'daily', TRUE, FALSE, NULL);
