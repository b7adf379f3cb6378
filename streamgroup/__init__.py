"""streamgroup: split items into groups from noisy pairwise answers on Redis Streams."""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

__version__ = "0.1.0"

__all__ = ["Client", "__version__"]

if TYPE_CHECKING:
    from .client import Client


def __getattr__(name: str) -> Any:
    # Lazy, so that importing the pure core (streamgroup.core) does not pull in redis.
    if name == "Client":
        from .client import Client

        return Client
    raise AttributeError(f"module 'streamgroup' has no attribute {name!r}")
