"""Tools around the engine: the synthetic feed generator and the benchmark."""
