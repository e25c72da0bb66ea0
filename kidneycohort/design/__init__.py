"""Trial design by simulation (placeholder, filled below)."""
