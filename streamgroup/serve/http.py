"""The worker's small HTTP endpoint: ``/metrics``, ``/healthz`` and ``/readyz``.

It runs on a daemon thread beside the worker loop, reads only in-memory state (the
metrics registry and a :class:`Health` object the loop updates) and never touches Redis,
so a scrape cannot slow a batch or hide a stuck loop. It listens on loopback by default
(``Settings.metrics_addr``); binding elsewhere is the operator's explicit choice.
"""

from __future__ import annotations

import socket
import threading
import time
from collections.abc import Callable
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer

from prometheus_client import CONTENT_TYPE_LATEST, generate_latest

from .metrics import WorkerMetrics

DEFAULT_STALE_AFTER = 30.0  # seconds without a loop heartbeat before /healthz fails


class Health:
    """Liveness and readiness as the worker loop reports them.

    ``beat()`` once per loop turn (a blocked XREADGROUP returns within ``block_ms``, so a
    live loop beats at least that often); ``set_ready(True)`` once the state is loaded and
    reading has begun, ``set_ready(False)`` while draining or reconnecting.

    Liveness is judged on heartbeats only once the loop has started (the first
    ``set_ready(True)``): loading a large state may take minutes and is not a hang. A
    start-up that never finishes shows as never ready, which is what a start-up probe on
    ``/readyz`` is for. The clock is injectable so tests need not sleep.
    """

    def __init__(self, stale_after: float = DEFAULT_STALE_AFTER,
                 clock: Callable[[], float] = time.monotonic,
                 metrics: WorkerMetrics | None = None) -> None:
        if not stale_after > 0:
            raise ValueError(f"stale_after must be positive (got {stale_after!r})")
        self.stale_after = stale_after
        self._clock = clock
        self._metrics = metrics
        self._lock = threading.Lock()
        self._last_beat = clock()
        self._started = False
        self._ready = False

    def beat(self) -> None:
        with self._lock:
            self._last_beat = self._clock()

    def set_ready(self, ready: bool) -> None:
        with self._lock:
            self._ready = bool(ready)
            if ready:
                self._started = True
                self._last_beat = self._clock()  # becoming ready is a sign of life too
        if self._metrics is not None:
            self._metrics.ready.set(1 if ready else 0)

    def beat_age(self) -> float:
        with self._lock:
            return max(0.0, self._clock() - self._last_beat)

    def alive(self) -> bool:
        return self.liveness()[0]

    def liveness(self) -> tuple[bool, str]:
        """(alive, a one-line reason for /healthz)."""
        with self._lock:
            started = self._started
            age = max(0.0, self._clock() - self._last_beat)
        if not started:
            return True, f"starting: loading state ({age:.1f}s since start)"
        if age <= self.stale_after:
            return True, f"ok: last loop heartbeat {age:.1f}s ago"
        return False, f"stale: last loop heartbeat {age:.1f}s ago (limit {self.stale_after:g}s)"

    def ready(self) -> bool:
        with self._lock:
            ready = self._ready
        return ready and self.alive()


def parse_addr(addr: str) -> tuple[str, int]:
    """``HOST:PORT`` (``[v6]:PORT`` for IPv6) to a (host, port) pair; port 0 = any free."""
    host, sep, port = addr.rpartition(":")
    if not sep or not host or not port.isdigit() or int(port) > 65535:
        raise ValueError(f"metrics address must be HOST:PORT (got {addr!r})")
    if host.startswith("[") and host.endswith("]"):
        host = host[1:-1]
    return host, int(port)


class _Server(ThreadingHTTPServer):
    daemon_threads = True
    # A restarted worker must be able to bind at once, not wait out TIME_WAIT.
    allow_reuse_address = True

    def __init__(self, host: str, port: int, metrics: WorkerMetrics, health: Health) -> None:
        if ":" in host:
            self.address_family = socket.AF_INET6
        self.metrics = metrics
        self.health = health
        super().__init__((host, port), _Handler)


class _Handler(BaseHTTPRequestHandler):
    server: _Server
    protocol_version = "HTTP/1.1"
    timeout = 30  # seconds: an idle or stalled client cannot hold a handler thread forever

    def do_GET(self) -> None:  # noqa: N802 (the name http.server dispatches to)
        path = self.path.split("?", 1)[0]
        if path == "/metrics":
            self._send(200, generate_latest(self.server.metrics.registry), CONTENT_TYPE_LATEST)
        elif path == "/healthz":
            ok, text = self.server.health.liveness()
            self._send(200 if ok else 503, (text + "\n").encode())
        elif path == "/readyz":
            ok = self.server.health.ready()
            self._send(200 if ok else 503, b"ready\n" if ok else b"not ready\n")
        elif path == "/":
            self._send(200, b"streamgroup worker: /metrics /healthz /readyz\n")
        else:
            self._send(404, b"not found\n")

    def do_HEAD(self) -> None:  # noqa: N802
        self.do_GET()

    def _send(self, code: int, body: bytes, ctype: str = "text/plain; charset=utf-8") -> None:
        self.send_response(code)
        self.send_header("Content-Type", ctype)
        self.send_header("Content-Length", str(len(body)))
        self.send_header("Cache-Control", "no-store")
        self.end_headers()
        if self.command != "HEAD":
            self.wfile.write(body)

    def log_message(self, format: str, *args: object) -> None:  # noqa: A002
        # Scrapes every few seconds would flood stderr; access logs are not wanted here.
        pass


class HttpServer:
    """A running endpoint; ``close()`` stops it and frees the port."""

    def __init__(self, server: _Server, thread: threading.Thread) -> None:
        self._server = server
        self._thread = thread

    @property
    def host(self) -> str:
        return str(self._server.server_address[0])

    @property
    def port(self) -> int:
        return int(self._server.server_address[1])

    @property
    def url(self) -> str:
        host = f"[{self.host}]" if ":" in self.host else self.host
        return f"http://{host}:{self.port}"

    def close(self) -> None:
        self._server.shutdown()
        self._server.server_close()
        self._thread.join(timeout=5)

    def __enter__(self) -> HttpServer:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


def start_http(addr: str, metrics: WorkerMetrics, health: Health) -> HttpServer:
    """Bind ``addr`` now (so a busy port fails at start-up) and serve on a daemon thread."""
    host, port = parse_addr(addr)
    server = _Server(host, port, metrics, health)
    thread = threading.Thread(target=server.serve_forever, kwargs={"poll_interval": 0.2},
                              name="sg-http", daemon=True)
    thread.start()
    return HttpServer(server, thread)
