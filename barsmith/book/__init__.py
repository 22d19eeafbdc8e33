"""Stage 2: per-symbol top-of-book with a live / resyncing state machine."""
