"""A simulated crowd, used by the demo, the tests and the benchmarks alike."""

from .crowd import Crowd, mixed_sources

__all__ = ["Crowd", "mixed_sources"]
