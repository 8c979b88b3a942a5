COPY factor_returns FROM '/etc/passwd';
