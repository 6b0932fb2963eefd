"""The numeric core: pure functions on arrays (no files, no keys on disk)."""
