"""Shared test fixtures: a private redis-server per test module, started on a free port."""

from __future__ import annotations

import shutil
from collections.abc import Iterator

import pytest
import redis

from tests.redisproc import RedisProc


@pytest.fixture(scope="module")
def redis_server() -> Iterator[RedisProc]:
    """A real redis-server for this module; skipped only if the binary is absent."""
    if shutil.which("redis-server") is None:
        pytest.skip("redis-server not installed")
    server = RedisProc().start()
    yield server
    server.cleanup()


@pytest.fixture
def redis_url(redis_server: RedisProc) -> Iterator[str]:
    """A clean database on the module's private server."""
    client = redis.Redis(port=redis_server.port)
    client.flushall()
    yield redis_server.url
    client.close()
