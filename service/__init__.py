"""Everything with I/O: the command line now; the HTTP app, store and workers to come."""
