"""Run a private Prometheus server (Debian package ``prometheus``) for tests and scripts.

It listens on a free loopback port with its own temporary config and TSDB directory, so it
never collides with a system Prometheus on the default port 9090.
"""

from __future__ import annotations

import json
import shutil
import subprocess
import tempfile
import time
import urllib.error
import urllib.parse
import urllib.request
from collections.abc import Callable
from pathlib import Path
from typing import Any

from tests.redisproc import free_port


class PromProc:
    """``prometheus`` scraping ``targets`` every ``interval`` on loopback."""

    def __init__(self, targets: list[str], interval: str = "1s",
                 rule_files: list[str] | None = None) -> None:
        if shutil.which("prometheus") is None:
            raise RuntimeError("prometheus binary not found on PATH")
        self.port = free_port()
        if self.port == 9090:  # never the system default
            self.port = free_port()
        self.dir = Path(tempfile.mkdtemp(prefix="sg-prom-"))
        rules = "".join(f"\n  - {json.dumps(str(Path(r).resolve()))}" for r in rule_files or [])
        (self.dir / "prometheus.yml").write_text(
            f"global:\n  scrape_interval: {interval}\n  evaluation_interval: {interval}\n"
            + (f"rule_files:{rules}\n" if rules else "")
            + "scrape_configs:\n  - job_name: streamgroup\n    static_configs:\n"
            f"      - targets: {json.dumps(targets)}\n")
        self.proc: subprocess.Popen[bytes] | None = None

    @property
    def url(self) -> str:
        return f"http://127.0.0.1:{self.port}"

    def start(self, timeout: float = 30.0) -> PromProc:
        self.log = open(self.dir / "prometheus.log", "wb")  # noqa: SIM115 (closed in stop)
        self.proc = subprocess.Popen(
            ["prometheus", f"--config.file={self.dir / 'prometheus.yml'}",
             f"--storage.tsdb.path={self.dir / 'data'}",
             f"--web.listen-address=127.0.0.1:{self.port}"],
            stdout=self.log, stderr=subprocess.STDOUT)
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            if self.proc.poll() is not None:
                raise RuntimeError(f"prometheus exited: {self.tail()}")
            try:
                with urllib.request.urlopen(self.url + "/-/ready", timeout=1) as r:
                    if r.status == 200:
                        return self
            except (urllib.error.URLError, ConnectionError, TimeoutError):
                pass
            time.sleep(0.1)
        raise RuntimeError(f"prometheus not ready within {timeout}s: {self.tail()}")

    def tail(self) -> str:
        path = self.dir / "prometheus.log"
        return path.read_text(errors="replace")[-2000:] if path.exists() else ""

    def api(self, path: str, **params: str) -> Any:
        url = f"{self.url}/api/v1/{path}?" + urllib.parse.urlencode(params)
        try:
            with urllib.request.urlopen(url, timeout=5) as r:
                return json.load(r)
        except urllib.error.HTTPError as err:  # 400 carries a JSON error body
            return json.load(err)

    def query(self, expr: str) -> Any:
        return self.api("query", query=expr)

    def wait_value(self, expr: str, want: float | Callable[[float], bool],
                   timeout: float = 30.0) -> float:
        """Poll an instant query until its first sample equals (or satisfies) ``want``."""
        ok = want if callable(want) else (lambda v: v == want)
        deadline = time.monotonic() + timeout
        last: Any = None
        while time.monotonic() < deadline:
            last = self.query(expr)
            res = last.get("data", {}).get("result", [])
            if res and ok(float(res[0]["value"][1])):
                return float(res[0]["value"][1])
            time.sleep(0.2)
        raise AssertionError(f"{expr} never became {want}: last answer {last}")

    def stop(self) -> None:
        if self.proc is not None and self.proc.poll() is None:
            self.proc.terminate()
            try:
                self.proc.wait(timeout=10)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait()
        if getattr(self, "log", None):
            self.log.close()
        shutil.rmtree(self.dir, ignore_errors=True)
