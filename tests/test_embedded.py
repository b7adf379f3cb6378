"""The embedded Redis of the demo: a private server on a free port, gone after stop()."""

from __future__ import annotations

import shutil

import pytest
import redis

from streamgroup.embedded import EmbeddedRedis, EmbeddedRedisError


@pytest.mark.parametrize("kind", ["redis-server", "fakeredis"])
def test_embedded_serves_streams_and_transactions(kind: str) -> None:
    """Both kinds answer the stream and MULTI/EXEC commands the worker uses, off port 6379."""
    if kind == "redis-server" and shutil.which("redis-server") is None:
        pytest.skip("redis-server not installed")
    with EmbeddedRedis(kind) as server:  # type: ignore[arg-type]
        assert server.kind == kind and server.port != 6379
        r = redis.Redis.from_url(server.url)
        r.xgroup_create("{t}:s", "g", id="0", mkstream=True)
        r.xadd("{t}:s", {"a": "1"})
        (_, entries), = r.xreadgroup("g", "c", {"{t}:s": ">"}, count=10, block=50)
        pipe = r.pipeline(transaction=True)
        pipe.hset("{t}:h", "k", "v")
        pipe.xack("{t}:s", "g", entries[0][0])
        assert pipe.execute() == [1, 1]
        r.close()
        url = server.url
    with pytest.raises(redis.ConnectionError):
        redis.Redis.from_url(url, socket_connect_timeout=1).ping()


def test_auto_prefers_the_binary() -> None:
    """`auto` starts redis-server when it is on PATH, else fakeredis."""
    with EmbeddedRedis("auto") as server:
        want = "redis-server" if shutil.which("redis-server") else "fakeredis"
        assert server.kind == want


def test_missing_binary_is_a_clear_error(monkeypatch: pytest.MonkeyPatch) -> None:
    """Asking for redis-server when it is not on PATH raises EmbeddedRedisError."""
    monkeypatch.setattr(shutil, "which", lambda _name: None)
    with pytest.raises(EmbeddedRedisError, match="not on PATH"):
        EmbeddedRedis("redis-server").start()
    with EmbeddedRedis("auto") as server:  # falls back to the in-process server
        assert server.kind == "fakeredis"
