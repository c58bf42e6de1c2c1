"""Storage: the write-ahead input log, the store (SQLite or PostgreSQL) and checkpoints with exact recovery."""
