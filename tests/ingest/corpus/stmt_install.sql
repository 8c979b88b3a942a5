INSTALL httpfs;
