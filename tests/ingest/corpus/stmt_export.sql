EXPORT DATABASE '/tmp/tracker-dump';
