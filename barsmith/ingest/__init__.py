"""Stage 1: bytes → decoded records (framing) → validated ticks, or counted rejects."""
