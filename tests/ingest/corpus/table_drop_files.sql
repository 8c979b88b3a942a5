INSERT INTO drop_files VALUES (99, 'x', 'x.sql', 1, 'applied', NULL, '{}', 0, '[]', now(), now(), NULL);
