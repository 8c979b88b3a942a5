this is not sql at all;
