"""Throughput, lookup latency and memory of the stream worker, against a private redis-server.

    python scripts/bench_stream.py --json                 # 1,000,000 items for the memory part
    python scripts/bench_stream.py --items 200000 --json  # a quicker run
    python scripts/bench_stream.py --drain-only --json    # rate and lookups only
    python scripts/bench_stream.py --hold-ms 0 --batch 200 --json     # fixed batches of 200

All figures come from one run on one private ``redis-server`` (started here on a free
port, persistence off), with the same batch size everywhere (``--batch``, default 500, the
worker's own default: the most entries one read asks for; the worker sizes its reads below
it to keep each transaction near ``hold_ms`` of Redis's time, ``--hold-ms``, default the
worker's own, and ``entries_per_read_plain`` says what it settled on). The workers run at
niceness 19 (``--worker-nice``), as the README advises for a worker that shares its host
with Redis and the readers, as it does here:

- ``raw_entries_per_s``: a bare XREADGROUP + XACK loop (redis-py, same client options as
  the worker) over pre-filled one-answer entries; it writes nothing else.
- ``worker_entries_per_s``: the worker (a separate process, as deployed) alone, as the bare
  loop is alone: it drains a backlog of one-answer entries, each the answer to one of its
  own questions, and writes about one new question entry per answer, plus the assignment
  records, the journal and the acknowledgements, all in one MULTI/EXEC per batch. The
  backlog is made in cycles: after a closed-loop warm-up (past the bootstrap), the worker
  is paused (SIGSTOP) while a simulated crowd adapter answers every question it has in
  flight (half the items: ``--drain-items`` / 2), then let go (SIGCONT) and timed until it
  has consumed them; ``--cycles`` windows, summed (after one that fills the cap). The
  adapter is idle in the windows, so it takes neither cores nor Redis time from the
  worker; ``ratio`` is this over raw.
- ``ratio_paired``: the same with the bare loop run again before each drain window, over
  as many entries as that window's backlog, while the worker is stopped
  (``raw_paired_entries_per_s``): both sides of the ratio from the same minute, where
  ``raw_entries_per_s`` brackets the run from its two ends, minutes apart on a machine
  whose speed can double between them. The paired windows also share the drain windows'
  background (the lookup process, Redis holding the namespace's data), which the
  brackets do not.
- ``packed_answers_per_s``: the same with column packs both ways (packed answers in,
  ``question_columns`` packs out), over ``--packed-items`` items, by a second worker on
  its own namespace. The two drains take turns, one cycle each (both set up and warmed up
  first; the idle one's worker and lookup process stopped, SIGSTOP, meanwhile), so that
  ``packed_over_plain`` compares windows from the same minutes, not runs minutes apart on
  a machine whose speed drifts.
- ``lookup_p99_ms``: HGET of random keys of ``{NS}:assign`` from another process, about
  500 per second, kept when they start inside the plain drain windows (the worker
  ingesting at full speed).
- ``loop_*``: the closed loop, for comparison: the adapter runs beside the worker on the
  same two cores and the same Redis, answering each question as it appears, and the rate
  is answer entries consumed per second over ``--seconds`` after the warm-up
  (``loop_packed_answers_per_s`` over ``--packed-items`` items as well, so that the window
  ends well before the work runs out).
  In every run every item is registered before the crowd starts.
- ``worker_bytes_per_item``: growth of the worker's resident memory while it registers
  ``--items`` items (after start-up), per item; ``redis_bytes_per_item``: growth of Redis's
  ``used_memory`` for the namespace after those items are in and a snapshot is written.

The machine is shared (2 cores for Redis, the worker, the adapter and the lookup
process, and whatever else runs there), so the rates move with the load:
``worker_cpu_share_*`` says how much of a core the worker got (``redis_cpu_share_*``
what Redis took), and ``*_per_cpu_s`` divides by it (the rate a dedicated core would
give, if the worker is the bottleneck); ``worker_sys_part_*`` is the part of the
worker's CPU spent in the kernel (mostly sending and receiving on the socket), and
``snapshots_in_windows`` counts the snapshots written in the drain windows (each a pause
of the worker: 0.1-0.3 s at these sizes; the workers here snapshot on their timer every
120 s, not every 30 as by default, so that the timer's snapshots stay out of windows a
few seconds long: ``--snapshot-every``); ``worker_faults_per_answer`` counts the
worker's minor page faults in them. ``redis_us_per_answer_*`` splits Redis's time by
command (from INFO commandstats; ``exec`` includes the commands inside it, ``eval`` the
appends its scripts make), ``loop_exec_ms_*`` is the mean time Redis spends inside one
batch transaction (lookups wait behind it), ``redis_slow_plain`` lists the commands that
held Redis for a millisecond or more in the drain windows (SLOWLOG: count and longest,
in ms), ``lookup_idle_p99_ms`` is the lookup latency of this machine with no worker
running, and ``lookup_busy_floor_p99_ms`` the same while a spinning process at niceness 0
keeps every core busy (Redis idle): what a woken process waits for a core behind busy
ones of its own weight (at niceness 19 the spinners leave 0.2-0.3 ms: ``--worker-nice``
gives the worker that setting; ``scripts/bench_machine.py`` shows the host's own pauses).

``BENCH_TURNS=PATH`` runs every worker through ``scripts/turn_probe.py``, which writes
the mean wall and CPU time of each phase of a full turn inside the drain windows to
``PATH.NS.json`` when the worker stops (where a turn waits, and for what).
``BENCH_PYSPY=PATH`` records a py-spy profile (raw format) of the worker over the drain
cycles, to ``PATH`` and ``PATH-packed`` (py-spy is a tool to install by hand, not a
dependency); with ``BENCH_PYSPY_IDLE=1`` the samples include the time it waits (py-spy
``--idle``), to see where it waits for Redis; ``BENCH_PYSPY_RATE`` sets the samples a
second (default 200). ``BENCH_PERF=PATH`` records
``perf record -g`` of the worker and Redis inside the drain windows only (perf's control
fifo; to ``PATH`` and ``PATH-packed``; read with ``perf report -i PATH --sort comm,sym``);
``BENCH_PERF_EVENT=page-faults`` samples that event instead of the CPU clock (where the
worker touches new memory).
``BENCH_LOOKUP_NICE=N`` runs the lookup
process at nice ``N`` (negative: ahead of the worker), to tell time spent waiting for a
core from time spent waiting for Redis. ``BENCH_REDIS_CPU=N`` pins Redis to CPU ``N`` and
everything else (the worker, the adapter, the lookups) to the other CPUs.
``BENCH_SLICE_US=N`` has Redis's threads and the lookup processes ask the kernel for a
time slice of ``N`` microseconds (sched_setattr; Linux 6.12 and later), so that they may
preempt a busy core when they wake instead of waiting out its slice.
"""

from __future__ import annotations

import argparse
import collections
import json
import os
import random
import shutil
import signal
import statistics
import subprocess
import sys
import tempfile
import time
from collections.abc import Generator, Iterator
from typing import Any

import hiredis
import msgpack
import numpy as np
import redis

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
sys.path.insert(0, ROOT)

from streamgroup.embedded import EmbeddedRedis  # noqa: E402
from streamgroup.keys import GROUP, Keys  # noqa: E402
from streamgroup.settings import Settings  # noqa: E402
from streamgroup.sim.crowd import Crowd  # noqa: E402
from streamgroup.stream.commit import xadd_script  # noqa: E402

FILL_ITEMS = """
for i = tonumber(ARGV[1]), tonumber(ARGV[2]) do
  redis.call('XADD', KEYS[1], '*', 'key', string.format(ARGV[3], i))
end
"""
FILL_ANSWERS = """
for i = tonumber(ARGV[1]), tonumber(ARGV[2]) do
  redis.call('XADD', KEYS[1], '*', 'a', 'shard-' .. i, 'b', 'shard-' .. (i + 1),
             'same', tostring(i % 2), 'source', 'src-' .. (i % 50), 'qid', tostring(i))
end
"""


ANSWER_SCRIPT = xadd_script(("a", "b", "same", "source", "qid"))


def key_format(n: int) -> str:
    return "shard-%0" + str(max(6, len(str(n - 1)))) + "d"  # as streamgroup.sim.crowd


def fill_items(r: redis.Redis, stream: str, n: int, chunk: int = 50_000) -> None:
    for lo in range(0, n, chunk):
        r.eval(FILL_ITEMS, 1, stream, lo, min(n, lo + chunk) - 1, key_format(n))


WORKER_ROOT = ROOT  # --worker-root: run the worker from another checkout (before/after)
SNAPSHOT_EVERY = 120.0  # --snapshot-every: the workers' snapshot_every (theirs: 30)
EXTRA_FLAGS: dict[str, Any] = {}  # --return-memory: keep_memory false; --worker-nice


TURNS = os.environ.get("BENCH_TURNS")  # the workers' turns timed by phase (turn_probe.py)


def spawn_worker(url: str, ns: str, **flags: Any) -> subprocess.Popen[bytes]:
    args = ([sys.executable, os.path.join(ROOT, "scripts", "turn_probe.py"),
             f"{TURNS}.{ns}.json", "--windows", "--"] if TURNS else
            [sys.executable, "-m", "streamgroup.stream.worker"])
    args += ["--redis", url, "--ns", ns, "--consumer", "bench", "--metrics-addr", "",
             "--log-level", "warning"]
    for k, v in {**EXTRA_FLAGS, **flags}.items():
        args += ["--" + k.replace("_", "-"), str(v)]
    env = {**os.environ, "PYTHONPATH": WORKER_ROOT}
    return subprocess.Popen(args, cwd=WORKER_ROOT, stdout=subprocess.DEVNULL, env=env)


def stop_worker(proc: subprocess.Popen[bytes]) -> int:
    proc.send_signal(signal.SIGTERM)
    try:
        return proc.wait(120)
    except subprocess.TimeoutExpired:
        proc.kill()
        return proc.wait(10)


def _proc_stat(pid: int) -> list[str]:
    """The fields of /proc/PID/stat after the command name (field 3, the state, first)."""
    with open(f"/proc/{pid}/stat") as fh:
        return fh.read().rsplit(")", 1)[1].split()


def minor_faults(pid: int) -> int:
    """Page faults of the process so far that needed no disk (each a trip to the kernel)."""
    return int(_proc_stat(pid)[7])


def cpu_seconds(pid: int) -> float:
    return sum(cpu_split(pid))


def cpu_split(pid: int) -> tuple[float, float]:
    """(user, system) CPU seconds of the process so far."""
    parts = _proc_stat(pid)
    tick = os.sysconf("SC_CLK_TCK")
    return int(parts[11]) / tick, int(parts[12]) / tick


def process_state(pid: int) -> str:
    """The state letter ("T": stopped by a signal)."""
    return _proc_stat(pid)[0]


def rss_bytes(pid: int) -> int:
    with open(f"/proc/{pid}/status") as fh:
        for line in fh:
            if line.startswith("VmRSS:"):
                return int(line.split()[1]) * 1024
    raise RuntimeError("no VmRSS")


def redis_cpu(r: redis.Redis) -> float:
    info = r.info("cpu")
    return float(info["used_cpu_user"]) + float(info["used_cpu_sys"])


def wait_until(cond: Any, timeout: float, what: str) -> None:
    deadline = time.monotonic() + timeout
    while not cond():
        if time.monotonic() > deadline:
            raise SystemExit(f"bench_stream: timed out waiting for {what}")
        time.sleep(0.05)


# -- the bare loop ------------------------------------------------------------------------


def bench_raw(url: str, batch: int, entries: int) -> float:
    """Entries per second of the bare loop over ``entries`` pre-filled entries."""
    done, seconds = raw_window(url, batch, entries)
    return done / seconds


def raw_window(url: str, batch: int, entries: int) -> tuple[int, float]:
    """The bare loop over ``entries`` pre-filled entries: (entries consumed, seconds)."""
    r = redis.Redis.from_url(url)
    stream = "{braw}:answers"
    for lo in range(0, entries, 50_000):
        r.eval(FILL_ANSWERS, 1, stream, lo, min(entries, lo + 50_000) - 1)
    r.xgroup_create(stream, GROUP, id="0")
    c = redis.Redis.from_url(url, single_connection_client=True)
    done = 0
    t0 = time.perf_counter()
    while done < entries:
        reply = c.xreadgroup(GROUP, "raw", {stream: ">"}, count=batch)
        ids = [e[0] for e in reply[0][1]]
        c.xack(stream, GROUP, *ids)
        done += len(ids)
    dt = time.perf_counter() - t0
    r.delete(stream)
    c.close()
    return done, dt


# -- the closed loop ------------------------------------------------------------------------


class Feeder:
    """A fast simulated crowd adapter: reads questions, writes one answer per question."""

    def __init__(self, url: str, ns: str, crowd: Crowd, pack: bool, batch: int) -> None:
        self.r = redis.Redis.from_url(url, single_connection_client=True)
        self.k = Keys(ns)
        self.crowd = crowd
        self.pack = pack
        self.r.xgroup_create(self.k.questions, "crowd", id="0", mkstream=True)
        self.names = np.array(crowd.source_names, dtype=object)
        self.questions = 0  # questions read (and answered) so far
        # entries per read: packed ones hold many questions; plain reads are the size of a
        # worker batch, so that no command of the adapter holds Redis up longer than the
        # worker's own
        self.count = 100 if pack else batch

    def step(self) -> int:
        reply = self.r.xreadgroup("crowd", "c", {self.k.questions: ">"}, count=self.count,
                                  block=100)
        if not reply:
            return 0
        entries = reply[0][1]
        qid: list[str] = []
        a: list[str] = []
        b: list[str] = []
        for _eid, f in entries:
            p = f.get(b"pack")
            if p is not None:
                data = msgpack.unpackb(p, raw=False)
                if isinstance(data, dict):  # a question column pack
                    qid += data["qid"]
                    a += data["a"]
                    b += data["b"]
                else:
                    qid += [m["qid"] for m in data]
                    a += [m["a"] for m in data]
                    b += [m["b"] for m in data]
            else:
                qid.append(f[b"qid"].decode())
                a.append(f[b"a"].decode())
                b.append(f[b"b"].decode())
        same, src = self.crowd.answer_keys(a, b)
        self.questions += len(qid)
        conn = self.r.connection
        cmds = [("XACK", self.k.questions, "crowd", *[e[0] for e in entries])]
        if self.pack:  # column packs: the cheaper form for a high-volume producer
            for i in range(0, len(qid), 10_000):
                j = i + 10_000
                cols = {"a": a[i:j], "b": b[i:j], "same": same[i:j], "source": src[i:j],
                        "qid": qid[i:j]}
                cmds.append(("XADD", self.k.answers, "*", "pack",
                             msgpack.packb(cols, use_bin_type=True)))
        else:
            vals: list[Any] = [None] * (5 * len(qid))
            vals[0::5], vals[1::5], vals[3::5], vals[4::5] = a, b, src, qid
            vals[2::5] = ["1" if x else "0" for x in same]
            cmds.append(("EVAL", ANSWER_SCRIPT, 1, self.k.answers, 0, *vals))
        conn.send_packed_command([b"".join(hiredis.pack_command(c) for c in cmds)])
        for _ in cmds:
            conn.read_response()
        return len(qid)


def lookup_child(url: str, ns: str, n: int, seconds: float, rate: float) -> None:
    """Run in a separate process: HGET random assignment keys; print each lookup's start
    (CLOCK_MONOTONIC, shared by every process here) and latency, so that the caller can keep
    the lookups that fall inside its measurement windows."""
    if os.environ.get("BENCH_LOOKUP_NICE"):
        os.nice(int(os.environ["BENCH_LOOKUP_NICE"]))
    short_slice()  # BENCH_SLICE_US: the lookups ask for a short slice, as Redis does
    r = redis.Redis.from_url(url, single_connection_client=True)
    k = Keys(ns)
    fmt = key_format(n)
    rng = random.Random(1)
    start: list[float] = []
    lat: list[float] = []
    end = time.monotonic() + seconds
    gap = 1.0 / rate
    stop = []
    signal.signal(signal.SIGTERM, lambda *_: stop.append(1))  # ends the run early
    while time.monotonic() < end and not stop:
        key = fmt % rng.randrange(n)
        s0 = time.monotonic()
        t0 = time.perf_counter()
        r.hget(k.assign, key)
        lat.append(time.perf_counter() - t0)
        start.append(s0)
        time.sleep(gap)
    print(json.dumps({"start": start, "ms": [x * 1000 for x in lat]}))


def latency_summary(start: list[float], ms: list[float],
                    windows: list[tuple[float, float]] | None = None) -> dict[str, Any]:
    """Percentiles of the lookups that started inside the windows (all when none given)."""
    a = np.array(ms)
    if windows is not None:
        t = np.array(start)
        keep = np.zeros(len(a), dtype=bool)
        for lo, hi in windows:
            keep |= (t >= lo) & (t < hi)
        a = a[keep]
    if len(a) == 0:
        return {"lookups": 0, "p50_ms": float("nan"), "p99_ms": float("nan"),
                "max_ms": float("nan")}
    return {"lookups": int(len(a)), "p50_ms": float(np.percentile(a, 50)),
            "p99_ms": float(np.percentile(a, 99)), "max_ms": float(a.max())}


def idle_lookups(url: str, seconds: float) -> dict[str, Any]:
    """Lookup latency with nothing else running on the server: this machine's floor."""
    r = redis.Redis.from_url(url)
    k = Keys("idle")
    for lo in range(0, 10_000, 1000):
        r.hset(k.assign, mapping={key_format(10_000) % i: b"x" * 60 for i in range(lo, lo + 1000)})
    child = subprocess.Popen(
        [sys.executable, os.path.abspath(__file__), "--lookup-child", url, "idle", "10000",
         str(min(seconds, 5.0)), "500"], stdout=subprocess.PIPE)
    line = child.communicate(timeout=seconds + 60)[0].decode().strip().splitlines()[-1]
    r.delete(k.assign)
    got = json.loads(line)
    return latency_summary(got["start"], got["ms"])


def busy_floor_lookups(url: str, seconds: float) -> dict[str, Any]:
    """Lookup latency with Redis idle but every core kept busy by a spinning process (as
    busy as the worker and Redis keep them in the drain): what this machine's scheduler
    alone adds to a lookup, the floor under ``lookup_p99_ms``."""
    hogs = [subprocess.Popen([sys.executable, "-c", "while True: pass"])
            for _ in range(os.cpu_count() or 1)]
    try:
        time.sleep(0.2)
        return idle_lookups(url, seconds)
    finally:
        for h in hogs:
            h.kill()
            h.wait()


def start_crowd_run(url: str, ns: str, n: int, batch: int, pack: bool, max_outstanding: int
                    ) -> tuple[redis.Redis, Keys, subprocess.Popen[bytes], Feeder]:
    """Fill ``n`` items, start the worker and wait until it has registered every one (so
    that what follows holds answers only), and make the simulated crowd adapter."""
    r = redis.Redis.from_url(url)
    k = Keys(ns)
    crowd = Crowd(n, delta=0.6, sources=[0.6] * 50, seed=1)
    fill_items(r, k.items, n)
    proc = spawn_worker(url, ns, batch=batch, block_ms=100, snapshot_every=SNAPSHOT_EVERY,
                        pack_questions=pack, max_outstanding=max_outstanding,
                        **({"question_columns": True} if pack else {}))
    wait_until(lambda: int(r.hget(k.meta, "items_applied") or 0) >= n, 600,
               "the worker to register the items")
    return r, k, proc, Feeder(url, ns, crowd, pack, batch)


def warm_up(feeder: Feeder, seconds: float) -> None:
    """The closed loop for a while: past the bootstrap, into the steady state."""
    t_end = time.monotonic() + seconds
    while time.monotonic() < t_end:
        feeder.step()


def us_per_answer(usec: dict[str, float], answers: int) -> dict[str, float]:
    """Redis's time by command (INFO commandstats) per answer consumed: the top eight."""
    top = sorted(usec.items(), key=lambda kv: -kv[1])[:8]
    return {name: round(us / max(1, answers), 3) for name, us in top}


def start_lookups(url: str, ns: str, n: int, seconds: float) -> subprocess.Popen[bytes]:
    return subprocess.Popen(
        [sys.executable, os.path.abspath(__file__), "--lookup-child", url, ns, str(n),
         str(seconds), "500"], stdout=subprocess.PIPE)


def bench_loop(url: str, ns: str, n: int, batch: int, pack: bool, warmup: float,
               seconds: float, lookups: bool, max_outstanding: int) -> dict[str, Any]:
    r, k, proc, feeder = start_crowd_run(url, ns, n, batch, pack, max_outstanding)

    def consumed() -> int:
        return int(r.hget(k.meta, "entries:answers") or 0)

    def applied() -> int:
        return int(r.hget(k.meta, "applied") or 0)

    warm_up(feeder, warmup)
    child = start_lookups(url, ns, n, seconds) if lookups else None
    r.config_resetstat()

    r0, f0 = redis_cpu(r), time.process_time()
    e0, a0, c0, t0 = consumed(), applied(), cpu_seconds(proc.pid), time.monotonic()
    q0 = feeder.questions
    t_end = t0 + seconds
    while time.monotonic() < t_end:
        feeder.step()
    e1, a1, c1, t1 = consumed(), applied(), cpu_seconds(proc.pid), time.monotonic()
    r1, f1 = redis_cpu(r), time.process_time()
    stats = r.info("commandstats")
    out: dict[str, Any] = {
        "entries_per_s": (e1 - e0) / (t1 - t0) if not pack else None,
        "answers_per_s": (a1 - a0) / (t1 - t0),
        "worker_cpu_share": (c1 - c0) / (t1 - t0),
        "redis_cpu_share": (r1 - r0) / (t1 - t0),
        "adapter_cpu_share": (f1 - f0) / (t1 - t0),
        "answers_in_window": a1 - a0,
        "questions_per_answer": (feeder.questions - q0) / max(1, a1 - a0),
        # mean time Redis spends inside one batch transaction (it serves nothing else then)
        "exec_ms": stats.get("cmdstat_exec", {}).get("usec_per_call", 0.0) / 1000,
        # where Redis's time goes, in microseconds per answer consumed, by command
        "redis_us_per_answer": us_per_answer(
            {name.removeprefix("cmdstat_"): v["usec"] for name, v in stats.items()}, a1 - a0),
    }
    if child is not None:
        line = child.communicate(timeout=seconds + 60)[0].decode().strip().splitlines()[-1]
        got = json.loads(line)
        out["lookup"] = latency_summary(got["start"], got["ms"])
    out["exit"] = stop_worker(proc)
    return out


class WindowPerf:
    """``perf record -g`` of some processes, counting only while enabled (a tool on the
    PATH, not a dependency): the drain windows alone, with call graphs into the kernel."""

    def __init__(self, path: str, pids: list[int]) -> None:
        self.dir = tempfile.mkdtemp(prefix="bench-perf-")
        self.ctl, self.ack = os.path.join(self.dir, "ctl"), os.path.join(self.dir, "ack")
        os.mkfifo(self.ctl)
        os.mkfifo(self.ack)
        self.proc = subprocess.Popen(
            ["perf", "record", "-g", "-D", "-1", "--control", f"fifo:{self.ctl},{self.ack}",
             *(["-e", os.environ["BENCH_PERF_EVENT"]] if os.environ.get("BENCH_PERF_EVENT")
               else []),
             "-p", ",".join(map(str, pids)), "-o", path],
            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        self.ctl_fh = open(self.ctl, "w")  # noqa: SIM115 (kept open across the windows)
        self.ack_fh = open(self.ack)  # noqa: SIM115

    def _say(self, word: str) -> None:
        self.ctl_fh.write(word + "\n")
        self.ctl_fh.flush()
        self.ack_fh.readline()

    def enable(self) -> None:
        self._say("enable")

    def disable(self) -> None:
        self._say("disable")

    def close(self) -> None:
        self.proc.send_signal(signal.SIGINT)
        self.proc.wait(60)
        self.ctl_fh.close()
        self.ack_fh.close()
        shutil.rmtree(self.dir, ignore_errors=True)


def interleaved(*runs: Iterator[None]) -> list[dict[str, Any]]:
    """Drive several :func:`drain_cycles` one cycle each in turn (each set up and warmed
    up first), so that their windows alternate and share the machine's moods; the
    results of each, in order."""
    out: list[dict[str, Any] | None] = [None] * len(runs)
    live = list(range(len(runs)))
    while live:
        for i in list(live):
            try:
                next(runs[i])
            except StopIteration as done:
                out[i] = done.value
                live.remove(i)
    return [o for o in out if o is not None]


POLL_MIN = 0.002  # seconds: how late a window's end may be seen at the most, near it


def poll_pause(done: int, left: int, elapsed: float) -> float:
    """How long to sleep before looking at the window's progress again: half the time the
    rest should take at the rate so far, between 2 and 50 ms. Each look is an HGET from
    this process, which takes a core from Redis or the worker when it wakes; polling every
    2 ms all through a window did so hundreds of times a second (a scheduler trace showed
    Redis taken off its core every 2.1 ms), where this looks a dozen times a window."""
    if done <= 0 or elapsed <= 0:
        return 0.01
    return max(POLL_MIN, min(0.05, 0.5 * left / (done / elapsed)))


def drain_cycles(url: str, ns: str, n: int, batch: int, pack: bool, warmup: float,
                 cycles: int, lookups: bool, max_outstanding: int
                 ) -> Generator[None, None, dict[str, Any]]:
    """The worker alone, as the bare loop is alone: it drains a backlog of answers to its
    own questions while no adapter runs. A generator: it pauses after its set-up and
    after each cycle (see :func:`interleaved`), and returns the figures.

    After a closed-loop warm-up, each cycle stops the worker (SIGSTOP), lets the adapter
    answer every question in the stream (about ``max_outstanding``: one per item in flight),
    then lets the worker go (SIGCONT) and times it until it has consumed that backlog. A
    first cycle, not measured, lets the worker fill the outstanding cap, so that in the
    measured ones it writes about one question per answer. The worker does everything it
    does in service: it reads the answers in batches, applies them, plans and writes the
    new questions, the assignment records, the journal and the acknowledgements in one
    MULTI/EXEC per batch. Only the adapter is idle during the windows, so it takes neither
    cores nor Redis time from the worker.
    """
    r, k, proc, feeder = start_crowd_run(url, ns, n, batch, pack, max_outstanding)

    def consumed() -> int:
        return int(r.hget(k.meta, "entries:answers" if not pack else "applied") or 0)

    warm_up(feeder, warmup)
    child = start_lookups(url, ns, n, 3600) if lookups else None  # ended by SIGTERM
    spy = None
    if os.environ.get("BENCH_PYSPY"):  # a profile of the worker over the cycles (a tool)
        spy = subprocess.Popen(["py-spy", "record", "--pid", str(proc.pid), "--format", "raw",
                                "-o", os.environ["BENCH_PYSPY"] + ("-packed" if pack else ""),
                                "--rate", os.environ.get("BENCH_PYSPY_RATE", "200"),
                                "--nonblocking",
                                *(["--idle"] if os.environ.get("BENCH_PYSPY_IDLE") else [])],
                               stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        time.sleep(1.0)
    perf = WindowPerf(os.environ["BENCH_PERF"] + ("-packed" if pack else ""),
                      [proc.pid, int(r.info("server")["process_id"])]
                      ) if os.environ.get("BENCH_PERF") else None
    windows: list[tuple[float, float]] = []
    backlogs: list[int] = []
    cpu = r_cpu = sys_cpu = 0.0
    usec: collections.Counter[str] = collections.Counter()
    tails: collections.defaultdict[str, list[float]] = collections.defaultdict(list)
    slow: collections.defaultdict[str, list[float]] = collections.defaultdict(list)
    r.config_set("slowlog-log-slower-than", 1000)  # microseconds

    def caught_up() -> bool:  # every answer in the stream read and committed
        last = r.xinfo_stream(k.answers)["last-generated-id"]
        group = next(g for g in r.xinfo_groups(k.answers) if g["name"] == GROUP.encode())
        return group["pending"] == 0 and group["last-delivered-id"] == last

    def pause_and_answer() -> int:
        """Stop the caught-up worker and answer every question it wrote; how many."""
        wait_until(caught_up, 120, "the worker to catch up")
        time.sleep(0.05)  # the questions of its last commit are in the stream by now
        proc.send_signal(signal.SIGSTOP)
        time.sleep(0.05)  # let a reply in flight land in the socket
        # The backlog is only a backlog if the worker stands still meanwhile. Started from
        # a shell job whose shell then exits, the kernel continues the stopped worker
        # (SIGCONT to an orphaned process group), and the drain below never ends.
        wait_until(lambda: process_state(proc.pid) == "T", 10, "the worker to stop")
        answered = 0
        while got := feeder.step():
            answered += got
        if process_state(proc.pid) != "T":
            raise SystemExit("bench_stream: the worker was continued by someone else while "
                             "the backlog was made (run the benchmark in the foreground)")
        return answered

    raw_done, raw_busy, snapshots, faults, reads = 0, 0.0, 0, 0, 0
    for cycle in range(cycles + 1):  # the first one only fills the cap: not measured
        # another run's cycle may come in between: this worker and its lookups stand still
        # meanwhile (idle, the worker would still expire and re-plan questions on its
        # timers, and take CPU from the other run's windows)
        for p in (proc, child):
            if p is not None:
                p.send_signal(signal.SIGSTOP)
        yield
        for p in (proc, child):
            if p is not None:
                p.send_signal(signal.SIGCONT)
        backlog = pause_and_answer()
        if cycle and not pack:  # the bare loop, just before the window, the worker stopped
            got, secs = raw_window(url, batch, backlog)
            raw_done, raw_busy = raw_done + got, raw_busy + secs
        target = consumed() + backlog
        r.config_resetstat()
        r.slowlog_reset()
        rc0 = redis_cpu(r)
        if perf is not None and cycle:
            perf.enable()
        if cycle and TURNS:
            proc.send_signal(signal.SIGUSR1)  # turn_probe: count the turns from here
        (u0, s0), f0, t0 = cpu_split(proc.pid), minor_faults(proc.pid), time.monotonic()
        proc.send_signal(signal.SIGCONT)
        deadline = time.monotonic() + 300
        start = target - backlog
        while (got := consumed()) < target:
            now = time.monotonic()
            if now > deadline:
                raise SystemExit(f"bench_stream: the worker consumed {got} of "
                                 f"{target} answer entries in 300 s")
            time.sleep(poll_pause(got - start, target - got, now - t0))
        t1 = time.monotonic()
        if cycle and TURNS:
            proc.send_signal(signal.SIGUSR2)  # turn_probe: up to here
        if perf is not None and cycle:
            perf.disable()
        if cycle == 0:
            continue
        backlogs.append(backlog)
        u1, s1 = cpu_split(proc.pid)
        faults += minor_faults(proc.pid) - f0
        cpu += u1 + s1 - u0 - s0
        sys_cpu += s1 - s0
        r_cpu += redis_cpu(r) - rc0
        for name, v in r.info("commandstats").items():
            usec[name.removeprefix("cmdstat_")] += v["usec"]
            if name == "cmdstat_xreadgroup":
                reads += v["calls"]
            if name == "cmdstat_rename":  # the snapshot script renames each one in place
                snapshots += v["calls"]
        lat = r.info("latencystats")  # Redis's own percentiles of each command, this window
        for name in ("exec", "xreadgroup"):
            got = lat.get(f"latency_percentiles_usec_{name}", {})
            for p in ("p50", "p99"):
                if p in got:
                    tails[f"{name}_{p}"].append(got[p] / 1000)
        windows.append((t0, t1))
        for e in r.slowlog_get(128):
            slow[e["command"].split(b" ", 1)[0].decode().lower()].append(e["duration"] / 1000)
    if perf is not None:
        perf.close()
    if spy is not None:
        spy.send_signal(signal.SIGINT)
        spy.wait(60)
    last = pause_and_answer()  # the questions the last window wrote
    proc.send_signal(signal.SIGCONT)
    done = sum(backlogs)
    busy = sum(hi - lo for lo, hi in windows)
    out: dict[str, Any] = {
        "rate": done / busy,
        # the bare loop over as many entries as each window's backlog, run right before
        # that window (the worker stopped): the same minute as the worker, not minutes off
        "raw_paired": raw_done / raw_busy if raw_busy else float("nan"),
        "answers_in_windows": done,
        "windows": len(windows),
        # the answer entries one read brought on average (the worker sizes its reads)
        "entries_per_read": done / reads if reads else float("nan"),
        "window_s": round(busy / len(windows), 3),
        # questions written in the windows (answered in the next fill) per answer consumed
        "questions_per_answer": (sum(backlogs[1:]) + last) / done,
        "backlogs": [*backlogs, last],
        "worker_cpu_share": cpu / busy,
        "redis_cpu_share": r_cpu / busy,
        "worker_sys_part": sys_cpu / cpu if cpu else 0.0,  # of its CPU, in the kernel
        # snapshots written in the windows: each is a pause of the worker (a window holds
        # one when the journal outgrows its bound or snapshot_every comes round)
        "snapshots": snapshots,
        "faults_per_answer": faults / done,
        "redis_us_per_answer": us_per_answer(usec, done),
        # how long Redis itself takes for one batch's read and transaction (it serves no
        # lookup meanwhile): the median over the windows of each window's percentile
        "redis_ms": {k: round(statistics.median(v), 3) for k, v in sorted(tails.items())},
        # the commands that held Redis for a millisecond or more (SLOWLOG): count, longest
        "redis_slow": {k: [len(v), round(max(v), 2)] for k, v in sorted(slow.items())},
    }
    if child is not None:
        child.send_signal(signal.SIGTERM)
        got = json.loads(child.communicate(timeout=60)[0].decode().strip().splitlines()[-1])
        out["lookup"] = latency_summary(got["start"], got["ms"], windows)
    out["exit"] = stop_worker(proc)
    return out


# -- memory -----------------------------------------------------------------------------


def bench_memory(url: str, ns: str, n: int, batch: int) -> dict[str, Any]:
    r = redis.Redis.from_url(url)
    r.flushall()
    k = Keys(ns)
    base_redis = int(r.info("memory")["used_memory"])
    proc = spawn_worker(url, ns, batch=batch, block_ms=100, snapshot_every=3600)
    wait_until(lambda: r.exists(k.snapshot), 60, "the worker to start")
    time.sleep(1.0)  # let start-up allocations settle before the baseline
    base_rss = rss_bytes(proc.pid)
    t0 = time.monotonic()
    fill_items(r, k.items, n)
    wait_until(lambda: int(r.hget(k.meta, "items_applied") or 0) >= n, 3600,
               "the worker to register every item")
    ingest = time.monotonic() - t0
    rss = rss_bytes(proc.pid)
    code = stop_worker(proc)  # writes the final snapshot
    used = int(r.info("memory")["used_memory"])
    return {
        "items": n,
        "worker_bytes_per_item": (rss - base_rss) / n,
        "redis_bytes_per_item": (used - base_redis) / n,
        "items_ingest_per_s": n / ingest,
        "assign_bytes_per_item": r.memory_usage(k.assign, samples=1000) / n,
        "snapshot_bytes_per_item": len(r.get(k.snapshot) or b"") / n,
        "exit": code,
    }


_SCHED_SETATTR = {"x86_64": 314, "aarch64": 274}  # syscall numbers (Linux's unistd tables)


def set_slice(pid: int, slice_ns: int) -> None:
    """Ask the kernel for a time slice of ``slice_ns`` for thread ``pid`` (SCHED_OTHER,
    its nice value kept): sched_setattr's ``sched_runtime``, which Linux 6.12 and later read
    as the task's slice under EEVDF. A task with a shorter slice than the one running may
    preempt it when it wakes, instead of waiting for that slice (1.4 ms by default on a
    machine of two cores) to run out."""
    import ctypes
    import struct

    number = _SCHED_SETATTR.get(os.uname().machine)
    if number is None:
        raise SystemExit(f"bench_stream: no sched_setattr number for {os.uname().machine}")
    libc = ctypes.CDLL(None, use_errno=True)
    # struct sched_attr (56 bytes): size, policy, flags, nice, priority, runtime, deadline,
    # period, util_min, util_max
    attr = struct.pack("IIQiIQQQII", 56, 0, 0, os.getpriority(os.PRIO_PROCESS, pid), 0,
                       slice_ns, 0, 0, 0, 0)
    if libc.syscall(number, pid, ctypes.create_string_buffer(attr), 0) != 0:
        err = ctypes.get_errno()
        raise SystemExit(f"bench_stream: sched_setattr({pid}): {os.strerror(err)}")


def short_slice(pid: int | None = None) -> None:
    """BENCH_SLICE_US=N: every thread of process ``pid`` (default: this one) asks for a
    slice of N microseconds (see :func:`set_slice`)."""
    us = os.environ.get("BENCH_SLICE_US")
    if not us:
        return
    pid = os.getpid() if pid is None else pid
    for tid in os.listdir(f"/proc/{pid}/task"):
        set_slice(int(tid), int(float(us) * 1000))


def pin(srv: EmbeddedRedis) -> None:
    """BENCH_REDIS_CPU=N: Redis alone on CPU N, everything else (this process and its
    children: the worker, the adapter, the lookups) on the other CPUs. BENCH_SLICE_US=N:
    Redis's threads ask for a slice of N microseconds."""
    if srv.pid is not None:
        short_slice(srv.pid)
    cpu = os.environ.get("BENCH_REDIS_CPU")
    if not cpu:
        return
    if srv.pid is None:
        raise SystemExit("bench_stream: BENCH_REDIS_CPU needs a redis-server process")
    os.sched_setaffinity(srv.pid, {int(cpu)})
    os.sched_setaffinity(0, set(range(os.cpu_count() or 1)) - {int(cpu)})


def packed_fields(plain: dict[str, Any], packed: dict[str, Any]) -> dict[str, Any]:
    """The packed drain's figures, beside the plain one's (the quick and full runs')."""
    return {
        "packed_answers_per_s": round(packed["rate"]),
        "packed_over_plain": round(packed["rate"] / plain["rate"], 2),
        "worker_cpu_share_packed": round(packed["worker_cpu_share"], 2),
        "worker_sys_part_packed": round(packed["worker_sys_part"], 2),
        "snapshots_in_windows": [plain["snapshots"], packed["snapshots"]],
        "worker_faults_per_answer": [round(plain["faults_per_answer"], 3),
                                     round(packed["faults_per_answer"], 3)],
        "redis_cpu_share_packed": round(packed["redis_cpu_share"], 2),
        # per second of the worker's own CPU time: what a dedicated core would give
        "packed_answers_per_cpu_s": round(packed["rate"] / packed["worker_cpu_share"]),
        "redis_us_per_answer_packed": packed["redis_us_per_answer"],
    }


def drains(url: str, args: argparse.Namespace, packed: bool
           ) -> tuple[dict[str, Any], dict[str, Any] | None]:
    """The plain drain (with lookups) and, if ``packed``, the packed one, their windows
    taking turns (the same minutes for both): their figures, the packed one's or None."""
    runs = [drain_cycles(url, "dw", args.drain_items, args.batch, False, args.warmup,
                         args.cycles, True, args.drain_items // 2)]
    if packed:
        runs.append(drain_cycles(url, "dp", args.packed_items, args.batch, True, args.warmup,
                                 args.cycles, False, args.packed_items // 2))
    plain, *rest = interleaved(*runs)
    return plain, (rest[0] if rest else None)


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    p.add_argument("--items", type=int, default=1_000_000, help="items for the memory part")
    p.add_argument("--loop-items", type=int, default=100_000,
                   help="items in the plain closed-loop run")
    p.add_argument("--packed-items", type=int, default=300_000,
                   help="items in the packed closed-loop run (more, so that the run never "
                        "reaches the end of the work, where fewer questions are in flight)")
    p.add_argument("--drain-items", type=int, default=200_000,
                   help="items in the plain drain run (half of them in flight: the backlog)")
    p.add_argument("--cycles", type=int, default=4, help="drain windows per run")
    p.add_argument("--batch", type=int, default=Settings.batch,
                   help="entries per XREADGROUP, for the worker (at the most) and the bare "
                        f"loop alike (default: {Settings.batch}, the worker's own default)")
    p.add_argument("--hold-ms", type=float, default=None,
                   help="the workers' hold_ms: Redis's time per batch transaction that "
                        "sizes their reads (default: the worker's own, "
                        f"{Settings.hold_ms}; 0: every read asks for --batch)")
    p.add_argument("--warmup", type=float, default=6.0)
    p.add_argument("--seconds", type=float, default=10.0, help="measurement window per run")
    p.add_argument("--raw-entries", type=int, default=200_000)
    p.add_argument("--json", action="store_true")
    p.add_argument("--drain-only", action="store_true",
                   help="only the bare loop and the plain drain with lookups (a quicker run, "
                        "for comparing batch sizes)")
    p.add_argument("--packed", action="store_true",
                   help="with --drain-only: the packed drain as well (packed_answers_per_s "
                        "and packed_over_plain from the same run)")
    p.add_argument("--worker-root", default=ROOT,
                   help="checkout whose worker to run (default: this one); the rest of the "
                        "benchmark stays the same, for before/after comparisons (a "
                        "checkout from before 54afb21 has no setting nice: add "
                        "--worker-nice 0, and run this one at 0 too; one from before "
                        "e36b7e0 reads fixed batches of --batch, and has no hold_ms)")
    p.add_argument("--snapshot-every", type=float, default=120.0,
                   help="the workers' snapshot_every in seconds (default: 120, where the "
                        "worker's own is 30: a pause of 0.1-0.3 s every 30 s is under 1%% "
                        "of its time, but a few seconds of windows that hold one would "
                        "count it ten times over, and with the drains taking turns, the "
                        "plain worker's came round in its windows in 4 runs of 5); a small "
                        "value puts snapshots into every drain window, to measure what "
                        "they cost")
    p.add_argument("--return-memory", action="store_true",
                   help="run the worker with keep_memory false (freed memory goes back to "
                        "the kernel), to measure what keeping it is worth")
    p.add_argument("--worker-nice", type=int, default=19,
                   help="the workers' niceness (setting nice, 0-19; default 19, as the "
                        "README advises for a worker that shares its host with Redis and "
                        "the readers, as here): a waking Redis or lookup process takes a "
                        "core from the worker at once instead of waiting out its time "
                        "slice; 0 for the worker's own default")
    p.add_argument("--lookup-child", nargs=5, help=argparse.SUPPRESS)
    args = p.parse_args(argv)
    global WORKER_ROOT, SNAPSHOT_EVERY
    WORKER_ROOT = os.path.abspath(args.worker_root)
    SNAPSHOT_EVERY = args.snapshot_every
    if args.return_memory:
        EXTRA_FLAGS["keep_memory"] = "false"
    if args.hold_ms is not None:
        EXTRA_FLAGS["hold_ms"] = args.hold_ms
    if args.worker_nice:  # (a --worker-root from before the setting, 54afb21, needs 0)
        EXTRA_FLAGS["nice"] = args.worker_nice
    if args.lookup_child:
        url, ns, n, secs, rate = args.lookup_child
        lookup_child(url, ns, int(n), float(secs), float(rate))
        return 0
    if args.drain_only:
        with EmbeddedRedis("redis-server") as srv:
            pin(srv)
            raw = bench_raw(srv.url, args.batch, args.raw_entries)
            plain, packed = drains(srv.url, args, args.packed)
            raw2 = bench_raw(srv.url, args.batch, args.raw_entries)
            floor = busy_floor_lookups(srv.url, args.seconds)
        raw_rate = (raw + raw2) / 2
        quick = {
            "batch": args.batch,
            "worker_nice": args.worker_nice,
            "hold_ms": Settings.hold_ms if args.hold_ms is None else args.hold_ms,
            "entries_per_read_plain": round(plain["entries_per_read"], 1),
            "raw_entries_per_s": round(raw_rate),
            "worker_entries_per_s": round(plain["rate"]),
            "ratio": round(plain["rate"] / raw_rate, 3),
            "raw_paired_entries_per_s": round(plain["raw_paired"]),
            "ratio_paired": round(plain["rate"] / plain["raw_paired"], 3),
            "questions_per_answer_plain": round(plain["questions_per_answer"], 3),
            "lookup_p99_ms": round(plain["lookup"]["p99_ms"], 3),
            "lookup_p50_ms": round(plain["lookup"]["p50_ms"], 3),
            "lookups": plain["lookup"]["lookups"],
            "lookup_busy_floor_p99_ms": round(floor["p99_ms"], 3),
            "worker_cpu_share_plain": round(plain["worker_cpu_share"], 2),
            "worker_sys_part_plain": round(plain["worker_sys_part"], 2),
            "redis_cpu_share_plain": round(plain["redis_cpu_share"], 2),
            "redis_us_per_answer_plain": plain["redis_us_per_answer"],
            "redis_ms_plain": plain["redis_ms"],
            "redis_slow_plain": plain["redis_slow"],
            "worker_exit_codes": [plain["exit"]],
        }
        if packed is not None:
            quick.update({
                **packed_fields(plain, packed),
                "worker_exit_codes": [plain["exit"], packed["exit"]],
            })
        print(json.dumps(quick, indent=2) if args.json else quick)
        return 0
    with EmbeddedRedis("redis-server") as srv:
        pin(srv)
        url = srv.url
        flush = redis.Redis.from_url(url).flushall
        raw = bench_raw(url, args.batch, args.raw_entries)
        idle = idle_lookups(url, args.seconds)
        floor = busy_floor_lookups(url, args.seconds)
        plain, packed = drains(url, args, True)
        assert packed is not None
        flush()
        loop = bench_loop(url, "bw", args.loop_items, args.batch, False, args.warmup,
                          args.seconds, True, 20 * args.batch)
        raw2 = bench_raw(url, args.batch, args.raw_entries)  # the load may drift: bracket
        flush()
        loop_packed = bench_loop(url, "bp", args.packed_items, args.batch, True, args.warmup,
                                 args.seconds, False, 50_000)
        mem = bench_memory(url, "bm", args.items, args.batch)
    raw_rate = (raw + raw2) / 2
    result = {
        "batch": args.batch,
        "worker_nice": args.worker_nice,
        "hold_ms": Settings.hold_ms if args.hold_ms is None else args.hold_ms,
        "entries_per_read_plain": round(plain["entries_per_read"], 1),
        "worker_root": WORKER_ROOT,
        "raw_entries_per_s": round(raw_rate),
        "raw_runs": [round(raw), round(raw2)],
        # the worker alone, draining a backlog of answers to its own questions
        "worker_entries_per_s": round(plain["rate"]),
        "ratio": round(plain["rate"] / raw_rate, 3),
        "raw_paired_entries_per_s": round(plain["raw_paired"]),
        "ratio_paired": round(plain["rate"] / plain["raw_paired"], 3),
        "questions_per_answer_plain": round(plain["questions_per_answer"], 3),
        **packed_fields(plain, packed),
        "questions_per_answer_packed": round(packed["questions_per_answer"], 3),
        "lookup_p99_ms": round(plain["lookup"]["p99_ms"], 3),
        "lookup_p50_ms": round(plain["lookup"]["p50_ms"], 3),
        "lookups": plain["lookup"]["lookups"],
        "lookup_idle_p99_ms": round(idle["p99_ms"], 3),
        "lookup_busy_floor_p99_ms": round(floor["p99_ms"], 3),
        "drain_windows": [plain["windows"], packed["windows"]],
        "drain_window_s": [plain["window_s"], packed["window_s"]],
        "worker_cpu_share_plain": round(plain["worker_cpu_share"], 2),
        "worker_sys_part_plain": round(plain["worker_sys_part"], 2),
        "redis_cpu_share_plain": round(plain["redis_cpu_share"], 2),
        # per second of the worker's own CPU time: what a dedicated core would give
        "worker_entries_per_cpu_s": round(plain["rate"] / plain["worker_cpu_share"]),
        "redis_us_per_answer_plain": plain["redis_us_per_answer"],
        "redis_ms_plain": plain["redis_ms"],
        "redis_slow_plain": plain["redis_slow"],
        # the closed loop: the simulated crowd adapter runs beside the worker, on the same
        # two cores and the same Redis, answering each question as it appears
        "loop_entries_per_s": round(loop["entries_per_s"]),
        "loop_ratio": round(loop["entries_per_s"] / raw_rate, 3),
        "loop_packed_answers_per_s": round(loop_packed["answers_per_s"]),
        "loop_lookup_p99_ms": round(loop["lookup"]["p99_ms"], 3),
        "loop_exec_ms_plain": round(loop["exec_ms"], 3),
        "loop_exec_ms_packed": round(loop_packed["exec_ms"], 3),
        "loop_cpu_shares_plain": {"worker": round(loop["worker_cpu_share"], 2),
                                  "redis": round(loop["redis_cpu_share"], 2),
                                  "adapter": round(loop["adapter_cpu_share"], 2)},
        "loop_cpu_shares_packed": {"worker": round(loop_packed["worker_cpu_share"], 2),
                                   "redis": round(loop_packed["redis_cpu_share"], 2),
                                   "adapter": round(loop_packed["adapter_cpu_share"], 2)},
        "items": mem["items"],
        "worker_bytes_per_item": round(mem["worker_bytes_per_item"], 1),
        "redis_bytes_per_item": round(mem["redis_bytes_per_item"], 1),
        "assign_bytes_per_item": round(mem["assign_bytes_per_item"], 1),
        "snapshot_bytes_per_item": round(mem["snapshot_bytes_per_item"], 1),
        "items_ingest_per_s": round(mem["items_ingest_per_s"]),
        "worker_exit_codes": [plain["exit"], loop["exit"], packed["exit"], loop_packed["exit"],
                              mem["exit"]],
    }
    if args.json:
        print(json.dumps(result, indent=2))
    else:
        for k, v in result.items():
            print(f"{k:28s} {v}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
