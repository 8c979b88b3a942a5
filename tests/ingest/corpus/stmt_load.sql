LOAD httpfs;
