"""Stage 3: bar specs and the accumulators that build time, tick, volume and notional bars."""
