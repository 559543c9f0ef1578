"""The statistics engine: pure functions of arrays (no files, no spec, no participants table)."""
