"""Plant models, the tick engine, the tape and run records (no device I/O)."""
