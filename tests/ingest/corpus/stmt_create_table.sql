CREATE TABLE stolen AS SELECT * FROM factor_returns;
