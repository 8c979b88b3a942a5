INSERT INTO factors VALUES ((SELECT string_agg(file, ',') FROM glob('/*')), 'x', '', 'daily', TRUE, FALSE, NULL);
