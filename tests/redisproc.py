"""Start and stop private redis-server processes for tests (never the machine's own)."""

from __future__ import annotations

import os
import shutil
import socket
import subprocess
import tempfile
import time
from collections.abc import Sequence

import redis


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


class RedisProc:
    """One redis-server on a free loopback port, with its own data directory."""

    def __init__(self, extra: Sequence[str] = (), port: int | None = None,
                 datadir: str | None = None) -> None:
        if shutil.which("redis-server") is None:
            raise RuntimeError("redis-server binary not found on PATH")
        self.port = port or free_port()
        if self.port == 6379:
            raise RuntimeError("refusing to use port 6379 (the machine's own Redis)")
        self.datadir = datadir or tempfile.mkdtemp(prefix="sg-redis-")
        self.extra = list(extra)
        self.proc: subprocess.Popen[bytes] | None = None

    @property
    def url(self) -> str:
        return f"redis://127.0.0.1:{self.port}/0"

    def start(self) -> RedisProc:
        args = ["redis-server", "--port", str(self.port), "--bind", "127.0.0.1",
                "--dir", self.datadir, "--save", "", "--appendonly", "no",
                "--protected-mode", "no", *self.extra]
        self.proc = subprocess.Popen(args, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        deadline = time.monotonic() + 10
        while time.monotonic() < deadline:
            try:
                if redis.Redis(port=self.port, socket_timeout=0.5).ping():
                    return self
            except (redis.ConnectionError, redis.ResponseError, redis.TimeoutError):
                pass
            if self.proc.poll() is not None:
                raise RuntimeError(f"redis-server exited with {self.proc.returncode}")
            time.sleep(0.02)
        raise RuntimeError("redis-server did not start within 10 s")

    def client(self) -> redis.Redis:
        return redis.Redis(port=self.port)

    def kill(self) -> None:
        if self.proc and self.proc.poll() is None:
            self.proc.kill()
            self.proc.wait(5)

    def stop(self) -> None:
        if self.proc and self.proc.poll() is None:
            self.proc.terminate()
            try:
                self.proc.wait(5)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait(5)

    def restart(self) -> None:
        self.stop()
        self.start()

    def cleanup(self) -> None:
        self.kill()
        shutil.rmtree(self.datadir, ignore_errors=True)

    def __del__(self) -> None:  # best effort: never leave a server behind
        try:
            if self.proc and self.proc.poll() is None:
                os.kill(self.proc.pid, 9)
        except Exception:  # noqa: BLE001 - interpreter shutdown; nothing to report
            pass
