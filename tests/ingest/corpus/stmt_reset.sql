RESET memory_limit;
