"""streamgroup: split items into groups from noisy pairwise answers on Redis Streams."""

from __future__ import annotations

__version__ = "0.1.0"

__all__ = ["__version__"]
