UPDATE factor_returns SET ret = 0.5 WHERE factor_id = 'MKT';
