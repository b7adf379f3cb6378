"""Faults against real redis-server processes: restarts, lost data, killed and paused
connections, maxmemory. Each compares with an uninterrupted run (see tests/faultkit.py)."""

from __future__ import annotations

import pytest

from tests import faultkit

pytestmark = pytest.mark.redis


def test_redis_restart_without_data_stops_the_worker_with_exit_3() -> None:
    """Redis comes back empty mid-run: the worker exits 3 with a clear error, writes nothing."""
    res = faultkit.redis_data_lost()
    assert res.passed, res.as_dict()
    assert "is gone" in res.details["message"] and "refusing to start over" in \
        res.details["message"]


def test_killed_connections_lose_nothing() -> None:
    """CLIENT KILL TYPE normal 8 times mid-run: reconnects, same end state as no kills."""
    res = faultkit.client_kill()
    assert res.passed, res.as_dict()
