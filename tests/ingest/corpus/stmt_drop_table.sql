DROP TABLE factors;
