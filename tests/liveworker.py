"""A real worker on a private redis-server, answered by the simulated crowd, for scrape tests.

The worker runs ``Worker.run()`` on a thread with its metrics endpoint on a free loopback
port; the crowd plays a crowd adapter (its own consumer group on ``{NS}:questions``) and
answers through ``{NS}:answers``, so every metric is driven by the real loop.
"""

from __future__ import annotations

import threading
import time
import urllib.error
import urllib.request
from collections.abc import Callable
from typing import Any

from prometheus_client.parser import text_string_to_metric_families

from streamgroup.client import Client
from streamgroup.core.types import Question
from streamgroup.serve.metrics import WorkerMetrics
from streamgroup.settings import Settings
from streamgroup.sim.crowd import Crowd
from tests.redisproc import free_port

Samples = dict[str, dict[tuple[tuple[str, str], ...], float]]


def scrape(url: str) -> tuple[set[str], Samples]:
    """(family names, {sample name: {labels: value}}) parsed with prometheus_client."""
    with urllib.request.urlopen(url + "/metrics", timeout=5) as resp:
        text = resp.read().decode()
    families: set[str] = set()
    samples: Samples = {}
    for fam in text_string_to_metric_families(text):
        families.add(fam.name)
        for s in fam.samples:
            samples.setdefault(s.name, {})[tuple(sorted(s.labels.items()))] = s.value
    return families, samples


def total(samples: Samples, name: str, **labels: str) -> float:
    """Sum of a sample over the label sets that match ``labels``."""
    want = set(labels.items())
    return sum(v for k, v in samples.get(name, {}).items() if want <= set(k))


class LiveWorker:
    """Start with ``with LiveWorker(redis_url) as w:``; ``w.answer_round()`` drives the crowd."""

    def __init__(self, redis_url: str, n: int = 40, ns: str = "live", seed: int = 5) -> None:
        self.port = free_port()
        self.url = f"http://127.0.0.1:{self.port}"
        self.settings = Settings(redis=redis_url, ns=ns, metrics_addr=f"127.0.0.1:{self.port}",
                                 block_ms=20, consumer="live-1", seed=seed, inflight=2,
                                 history_every=0.2)
        self.metrics = WorkerMetrics()
        self.crowd = Crowd(n, sources=[0.8, 0.7, 0.75, 0.0, -0.6], seed=seed)
        self.client = Client(redis_url, ns)
        self.exit_codes: list[int] = []
        self._thread: threading.Thread | None = None

    def __enter__(self) -> LiveWorker:
        from streamgroup.stream.worker import Worker

        self.worker = Worker(self.settings, self.metrics)
        self._thread = threading.Thread(target=lambda: self.exit_codes.append(self.worker.run()),
                                        name="live-worker", daemon=True)
        self._thread.start()
        self.client.ensure_group("crowd")
        self.wait(lambda: self.http_status("/readyz") == 200, 30, "worker ready")
        return self

    def __exit__(self, *exc: object) -> None:
        self.worker.request_stop()
        if self._thread is not None:
            self._thread.join(timeout=30)
        self.client.close()

    def http_status(self, path: str) -> int | None:
        try:
            with urllib.request.urlopen(self.url + path, timeout=2) as resp:
                return int(resp.status)
        except urllib.error.HTTPError as err:
            return int(err.code)
        except (urllib.error.URLError, ConnectionError, TimeoutError):
            return None

    def wait(self, cond: Callable[[], Any], timeout: float, what: str) -> Any:
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            got = cond()
            if got:
                return got
            if self.exit_codes:
                raise AssertionError(f"worker exited with {self.exit_codes} waiting for {what}")
            time.sleep(0.02)
        raise AssertionError(f"timed out after {timeout}s waiting for {what}")

    def answer_round(self) -> int:
        """Answer every question the worker has issued so far; returns how many."""
        batch = self.client.read_questions("crowd", "crowd-1", count=500, block_ms=20)
        qs = [Question(q["qid"], q["a"], q["b"], q["why"], int(q["ts"]))
              for _, entry in batch for q in entry]
        if qs:
            self.client.push_answers(self.crowd.answer_now(qs))
        self.client.ack_questions("crowd", [eid for eid, _ in batch])
        return len(qs)

    def run_to_end(self, timeout: float = 90.0) -> None:
        """Answer until every item is placed or unresolved (by the worker's own metrics)."""
        n = self.crowd.n

        def finished() -> bool:
            self.answer_round()
            _, s = scrape(self.url)
            done = (total(s, "streamgroup_items", status="placed")
                    + total(s, "streamgroup_items", status="unresolved"))
            return done >= n
        self.wait(finished, timeout, "every item placed or unresolved")

