"""The exception types of streamgroup's public surface."""

from __future__ import annotations


class StreamgroupError(Exception):
    """Base class of every error streamgroup raises on purpose."""


class EngineInputError(StreamgroupError, ValueError):
    """Bad input handed to the placement engine's API.

    Raised before anything is applied: a call that raises this leaves the engine
    exactly as it was (no partial application).
    """


class ConfigError(StreamgroupError, ValueError):
    """A setting is unknown, malformed or out of range."""


class StateError(StreamgroupError):
    """The committed state in Redis is missing, foreign or inconsistent."""
