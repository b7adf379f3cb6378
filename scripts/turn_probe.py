"""Run the stream worker with a probe on its turns: wall and CPU time by phase.

    python scripts/turn_probe.py OUT [--windows] -- --redis URL --ns NS [worker flags...]

The worker runs as ``python -m streamgroup.stream.worker`` would, with the functions its
turn calls wrapped (nothing in the worker changes): ``send`` (the commit's write),
``process``, ``Worker._build``, redis-py's ``read_response`` (replies read through
redis-py: the batch read ahead, and plain reads) and ``receive`` (the commit's replies).
Only turns that consumed entries count (the worker sizes its reads, so a turn's entries
vary: ``entries`` is their mean), and with ``--windows`` only those between a SIGUSR1 and
the next SIGUSR2 (the measured windows of a benchmark; the worker's own signals are TERM
and INT). At exit the probe writes ``OUT`` as JSON: turns counted, mean entries a turn,
and for each phase and for the whole turn the mean wall time and the mean CPU time of the
worker's thread in microseconds (``rest`` is the turn less the phases). Wall time beyond
CPU time is time the worker waited, for Redis or for a core. ``redis_held`` is not the
worker's: Redis's own time inside the transaction whose replies the turn read (from the
plan's ``TIME`` replies; in the wall column), for comparison with the wait in ``receive``.

``bench_stream.py`` runs its workers through this probe when ``BENCH_TURNS=PATH`` is set
(one file per namespace: ``PATH.NS.json``) and signals its drain windows. The worker is
imported from ``PYTHONPATH``, so ``--worker-root`` probes another checkout the same way.
"""

from __future__ import annotations

import atexit
import functools
import json
import signal
import sys
import time
from collections.abc import Callable
from typing import Any


class Probe:
    """Wall and thread-CPU time by phase, over the turns that consumed entries."""

    def __init__(self, out: str, on: bool = True) -> None:
        self.out, self.on = out, on
        self.turn: dict[str, list[float]] = {}
        self.total: dict[str, list[float]] = {}
        self.turns = self.entries = 0

    def timed(self, name: str, fn: Callable[..., Any]) -> Callable[..., Any]:
        @functools.wraps(fn)
        def wrapper(*args: Any, **kwargs: Any) -> Any:
            w, c = time.perf_counter(), time.thread_time()
            try:
                return fn(*args, **kwargs)
            finally:
                got = self.turn.setdefault(name, [0.0, 0.0])
                got[0] += time.perf_counter() - w
                got[1] += time.thread_time() - c
        return wrapper

    def held(self, receive: Callable[..., Any]) -> Callable[..., Any]:
        """Record Redis's own time inside the transaction (``plan.held_us``, timed plans)."""
        @functools.wraps(receive)
        def wrapper(client: Any, plan: Any) -> Any:
            out = receive(client, plan)
            if getattr(plan, "held_us", None) is not None:
                self.turn["redis_held"] = [plan.held_us / 1e6, 0.0]
            return out
        return wrapper

    def turn_of(self, fn: Callable[..., int]) -> Callable[..., int]:
        @functools.wraps(fn)
        def wrapper(*args: Any, **kwargs: Any) -> int:
            self.turn = {}
            w, c = time.perf_counter(), time.thread_time()
            n = fn(*args, **kwargs)
            if n > 0 and self.on:
                phases = self.turn
                whole = [time.perf_counter() - w, time.thread_time() - c]
                held = phases.pop("redis_held", None)  # Redis's time, not the worker's
                rest = [whole[0] - sum(v[0] for v in phases.values()),
                        whole[1] - sum(v[1] for v in phases.values())]
                if held is not None:
                    phases["redis_held"] = held
                for name, v in (*phases.items(), ("rest", rest), ("turn", whole)):
                    acc = self.total.setdefault(name, [0.0, 0.0])
                    acc[0] += v[0]
                    acc[1] += v[1]
                self.turns += 1
                self.entries += n
            return n
        return wrapper

    def write(self) -> None:
        n = max(self.turns, 1)
        report = {"turns": self.turns, "entries": round(self.entries / n, 1),
                  "wall_us": {k: round(v[0] / n * 1e6, 1) for k, v in self.total.items()},
                  "cpu_us": {k: round(v[1] / n * 1e6, 1) for k, v in self.total.items()}}
        with open(self.out, "w") as fh:
            json.dump(report, fh, indent=1)


def main(argv: list[str]) -> int:
    windows = len(argv) > 1 and argv[1] == "--windows"
    rest = argv[2:] if windows else argv[1:]
    if not argv or not rest or rest[0] != "--":
        print("usage: turn_probe.py OUT [--windows] -- WORKER_FLAGS...", file=sys.stderr)
        return 2
    out, flags = argv[0], rest[1:]
    import redis.connection

    from streamgroup.stream import worker

    probe = Probe(out, on=not windows)
    signal.signal(signal.SIGUSR1, lambda *_: setattr(probe, "on", True))
    signal.signal(signal.SIGUSR2, lambda *_: setattr(probe, "on", False))
    worker.send = probe.timed("send", worker.send)
    worker.process = probe.timed("process", worker.process)
    worker.receive = probe.held(probe.timed("receive", worker.receive))
    worker.Worker._build = probe.timed("build", worker.Worker._build)  # type: ignore[method-assign]
    worker.Worker._turn = probe.turn_of(worker.Worker._turn)  # type: ignore[method-assign]
    conn = redis.connection.AbstractConnection
    conn.read_response = probe.timed("read_response", conn.read_response)  # type: ignore[method-assign]
    atexit.register(probe.write)
    return worker.main(flags)


if __name__ == "__main__":
    raise SystemExit(main(sys.argv[1:]))
