"""The pure placement engine: no I/O, deterministic for a seed, numpy on the hot path."""
