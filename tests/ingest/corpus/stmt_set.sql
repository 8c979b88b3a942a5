SET enable_external_access = true;
