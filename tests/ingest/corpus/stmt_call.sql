CALL pragma_version();
