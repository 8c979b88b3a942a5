COPY factor_returns TO '/tmp/tracker-leak.csv' (HEADER);
