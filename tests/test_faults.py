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


def test_maxmemory_refuses_whole_batches_and_the_worker_resumes_when_freed() -> None:
    """At maxmemory no batch is half applied; the worker waits (no exit) and then finishes."""
    res = faultkit.redis_maxmemory()
    assert res.passed, res.as_dict()


def test_redis_killed_and_restarted_with_aof_loses_nothing() -> None:
    """Redis -9 and back 3 times (appendfsync always): same end state as no restarts."""
    res = faultkit.redis_restart_aof()
    assert res.passed, res.as_dict()
