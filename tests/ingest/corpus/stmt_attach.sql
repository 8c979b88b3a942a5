ATTACH '/tmp/tracker-other.duckdb' AS other;
