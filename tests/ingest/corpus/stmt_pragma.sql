PRAGMA database_list;
