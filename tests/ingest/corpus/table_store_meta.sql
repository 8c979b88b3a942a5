INSERT INTO store_meta VALUES ('data_version', '0');
