"""A private Redis for the demo and for trying things out, with nothing to install by hand.

When a ``redis-server`` binary is on PATH we start one on a free loopback port with
persistence off and its own scratch directory; otherwise we serve an in-process fakeredis
over TCP (``fakeredis.TcpFakeServer``), which speaks the same protocol to any client,
including the worker. Either way the caller gets a ``redis://127.0.0.1:PORT/0`` URL and the
server goes away on :meth:`EmbeddedRedis.stop` (or at the end of a ``with`` block).

The machine's own Redis on port 6379 is never used: the port is asked from the kernel.
"""

from __future__ import annotations

import shutil
import socket
import subprocess
import tempfile
import threading
import time
from types import TracebackType
from typing import Literal

import redis

from .errors import StreamgroupError

Kind = Literal["auto", "redis-server", "fakeredis"]


class EmbeddedRedisError(StreamgroupError):
    """The private Redis could not be started."""


def free_port() -> int:
    """A TCP port on loopback that was free a moment ago (the kernel picks it)."""
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


class EmbeddedRedis:
    """One private Redis server; ``kind`` is ``auto``, ``redis-server`` or ``fakeredis``."""

    def __init__(self, kind: Kind = "auto", start_timeout: float = 10.0) -> None:
        self.requested = kind
        self.start_timeout = start_timeout
        self.kind: str | None = None  # what actually runs, once started
        self.port: int | None = None
        self._proc: subprocess.Popen[bytes] | None = None
        self._datadir: str | None = None
        self._fake = None  # fakeredis.TcpFakeServer, imported lazily
        self._thread: threading.Thread | None = None

    @property
    def url(self) -> str:
        if self.port is None:
            raise EmbeddedRedisError("the embedded Redis is not running")
        return f"redis://127.0.0.1:{self.port}/0"

    @property
    def pid(self) -> int | None:
        """The redis-server process id (None for the in-process fallback)."""
        return self._proc.pid if self._proc is not None else None

    def start(self) -> EmbeddedRedis:
        kind = self.requested
        if kind == "auto":
            kind = "redis-server" if shutil.which("redis-server") else "fakeredis"
        if kind == "redis-server":
            self._start_binary()
        elif kind == "fakeredis":
            self._start_fake()
        else:
            raise EmbeddedRedisError(f"unknown embedded Redis kind {kind!r}")
        self.kind = kind
        return self

    def _start_binary(self) -> None:
        if shutil.which("redis-server") is None:
            raise EmbeddedRedisError("redis-server is not on PATH")
        # Two processes may be handed the same free port; retry a few times on a clash.
        for _ in range(3):
            port = free_port()
            self._datadir = tempfile.mkdtemp(prefix="streamgroup-redis-")
            args = ["redis-server", "--port", str(port), "--bind", "127.0.0.1",
                    "--dir", self._datadir, "--save", "", "--appendonly", "no",
                    "--protected-mode", "yes", "--loglevel", "warning"]
            self._proc = subprocess.Popen(args, stdout=subprocess.DEVNULL,
                                          stderr=subprocess.DEVNULL)
            if self._wait_ready(port, self._proc):
                self.port = port
                return
            self._stop_binary()
        raise EmbeddedRedisError("redis-server did not start on a free loopback port")

    def _start_fake(self) -> None:
        try:
            from fakeredis import TcpFakeServer
        except ImportError:  # pragma: no cover - fakeredis is a runtime dependency
            raise EmbeddedRedisError(
                "no redis-server on PATH and fakeredis is not installed; "
                "install one of them or point --redis at your own server") from None
        # Port 0: the kernel picks a free port at bind time, so there is no race.
        server = TcpFakeServer(("127.0.0.1", 0), server_type="redis")
        server.daemon_threads = True  # a stuck client must not keep the process alive
        self._fake = server
        self._thread = threading.Thread(target=server.serve_forever, name="fakeredis",
                                        kwargs={"poll_interval": 0.05}, daemon=True)
        self._thread.start()
        port = int(server.server_address[1])
        if not self._wait_ready(port, None):
            self._stop_fake()
            raise EmbeddedRedisError("the in-process fakeredis server did not answer")
        self.port = port

    def _wait_ready(self, port: int, proc: subprocess.Popen[bytes] | None) -> bool:
        deadline = time.monotonic() + self.start_timeout
        while time.monotonic() < deadline:
            if proc is not None and proc.poll() is not None:
                return False
            try:
                with redis.Redis(host="127.0.0.1", port=port, socket_timeout=0.5,
                                 socket_connect_timeout=0.5) as r:
                    if r.ping():
                        return True
            except (redis.ConnectionError, redis.TimeoutError, redis.ResponseError):
                pass
            time.sleep(0.02)
        return False

    def stop(self) -> None:
        """Stop the server and remove its scratch data; safe to call twice."""
        self._stop_binary()
        self._stop_fake()
        self.port = None

    def _stop_binary(self) -> None:
        if self._proc is not None:
            if self._proc.poll() is None:
                self._proc.terminate()
                try:
                    self._proc.wait(5)
                except subprocess.TimeoutExpired:
                    self._proc.kill()
                    self._proc.wait(5)
            self._proc = None
        if self._datadir is not None:
            shutil.rmtree(self._datadir, ignore_errors=True)
            self._datadir = None

    def _stop_fake(self) -> None:
        if self._fake is not None:
            self._fake.shutdown()
            self._fake.server_close()
            self._fake = None
        if self._thread is not None:
            self._thread.join(5)
            self._thread = None

    def __enter__(self) -> EmbeddedRedis:
        return self.start() if self.port is None else self

    def __exit__(self, exc_type: type[BaseException] | None, exc: BaseException | None,
                 tb: TracebackType | None) -> None:
        self.stop()

    def __del__(self) -> None:  # best effort: never leave a redis-server behind
        try:
            if self._proc is not None and self._proc.poll() is None:
                self._proc.kill()
        except Exception:  # noqa: BLE001 - interpreter shutdown; nothing to report
            pass
