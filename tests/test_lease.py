"""One worker per namespace: a second one waits, a lost lease stops a worker, a restart
under the same consumer name takes over at once."""

from __future__ import annotations

import signal
import subprocess
import sys
import time
from pathlib import Path
from typing import Any

import pytest
import redis

from streamgroup.keys import Keys
from streamgroup.stream import lease
from tests.redisproc import RedisProc
from tests.test_crash import ROOT, WORKER_FLAGS, consumed, recorded_input, wait_for, write_input

pytestmark = [pytest.mark.redis]


def spawn(url: str, ns: str, log: Path, **extra: Any) -> subprocess.Popen[bytes]:
    """A worker process whose log lines go to ``log``."""
    args = [sys.executable, "-m", "streamgroup.stream.worker", "--redis", url, "--ns", ns]
    for name, v in {**WORKER_FLAGS, **extra}.items():
        args += ["--" + name.replace("_", "-"), str(v)]
    with open(log, "ab") as fh:
        return subprocess.Popen(args, cwd=ROOT, stdout=fh, stderr=subprocess.STDOUT)


def test_lease_is_taken_renewed_and_released_only_by_its_holder(redis_url: str) -> None:
    r = redis.Redis.from_url(redis_url)
    k = Keys("unit")
    one, two = lease.holder_name("w1"), lease.holder_name("w2")
    assert lease.take(r, k, one, 5000) is None
    assert lease.take(r, k, one, 5000) is None  # a renewal
    assert lease.take(r, k, two, 5000) == one
    assert lease.take(r, k, two, 5000, same_name=True) == one  # another name: still no
    again = lease.holder_name("w1")  # w1 restarted: a new process, the same name
    assert lease.take(r, k, again, 5000) == one
    assert lease.take(r, k, again, 5000, same_name=True) is None
    assert lease.take(r, k, one, 5000) == again  # the old process has lost it
    assert not lease.release(r, k, one) and r.exists(k.lease)
    assert lease.release(r, k, again) and not r.exists(k.lease)
    assert lease.take(r, k, two, 100) is None
    time.sleep(0.25)  # expired: free for anyone
    assert lease.take(r, k, one, 5000) is None


def test_a_second_worker_waits_and_takes_over_after_a_clean_stop(redis_url: str,
                                                                 tmp_path: Path) -> None:
    r = redis.Redis.from_url(redis_url)
    crowd, entries = recorded_input(n=600, seed=5)  # a few seconds of work at batch 5
    write_input(r, "two", crowd, entries)
    k = Keys("two")
    total = r.xlen(k.answers)
    first = spawn(redis_url, "two", tmp_path / "a.log", batch=5, consumer="w-a")
    wait_for(lambda: int(r.hget(k.meta, "seq") or 0) >= 5, 30, "the first worker to commit")
    second = spawn(redis_url, "two", tmp_path / "b.log", batch=5, consumer="w-b")
    # it says so once it has tried (a loaded machine may take a while to start it)
    wait_for(lambda: "another worker holds the namespace" in (tmp_path / "b.log").read_text()
             or second.poll() is not None, 30, "the second worker to find the lease taken")
    assert second.poll() is None  # waiting, not failing
    assert b"w-a" in r.get(k.lease)
    assert not any(c["name"] == b"w-b" for c in r.xinfo_consumers(k.answers, "streamgroup"))
    first.send_signal(signal.SIGTERM)
    assert first.wait(15) == 0
    assert not consumed(r, "two")  # work is left for the second one
    wait_for(lambda: consumed(r, "two"), 60, "the second worker to finish the stream")
    assert b"w-b" in r.get(k.lease)
    second.send_signal(signal.SIGTERM)
    assert second.wait(15) == 0
    assert int(r.hget(k.meta, "entries:answers")) == total  # each entry read once
    assert not r.exists(k.lease)  # released on the clean stop


def test_a_worker_whose_lease_was_taken_stops_with_exit_4(redis_url: str,
                                                          tmp_path: Path) -> None:
    r = redis.Redis.from_url(redis_url)
    crowd, entries = recorded_input(n=150, seed=6)
    write_input(r, "lost", crowd, entries)
    k = Keys("lost")
    proc = spawn(redis_url, "lost", tmp_path / "w.log", batch=2, consumer="w-a")
    wait_for(lambda: int(r.hget(k.meta, "seq") or 0) >= 3, 30, "the worker to commit")
    r.set(k.lease, lease.holder_name("intruder"))
    assert proc.wait(15) == 4
    log = (tmp_path / "w.log").read_text()
    assert "lease lost" in log and "intruder" in log


def test_a_restart_under_the_same_name_does_not_wait_for_the_lease(redis_url: str,
                                                                  tmp_path: Path) -> None:
    r = redis.Redis.from_url(redis_url)
    crowd, entries = recorded_input(n=150, seed=7)
    write_input(r, "again", crowd, entries)
    k = Keys("again")
    proc = spawn(redis_url, "again", tmp_path / "w.log", batch=5, consumer="w-a",
                 lease_ttl=60)
    wait_for(lambda: int(r.hget(k.meta, "seq") or 0) >= 3, 30, "the worker to commit")
    proc.kill()
    proc.wait(10)
    assert r.pttl(k.lease) > 30_000  # the dead worker's lease is still there
    seq = int(r.hget(k.meta, "seq"))
    t0 = time.monotonic()
    proc = spawn(redis_url, "again", tmp_path / "w.log", batch=5, consumer="w-a",
                 lease_ttl=60)
    wait_for(lambda: int(r.hget(k.meta, "seq") or 0) > seq, 20, "the restart to commit")
    assert time.monotonic() - t0 < 20
    wait_for(lambda: consumed(r, "again"), 60, "the restarted worker to finish")
    proc.send_signal(signal.SIGTERM)
    assert proc.wait(15) == 0


def test_a_waiting_worker_refuses_a_namespace_whose_data_was_lost(tmp_path: Path) -> None:
    """Redis comes back empty while a second worker waits for the lease: the waiting one
    saw the namespace in use, so it exits 3 like the holder instead of starting over."""
    server = RedisProc().start()  # its own server: this test restarts it without its data
    procs: list[subprocess.Popen[bytes]] = []
    try:
        r = server.client()
        crowd, entries = recorded_input(n=150, seed=8)
        write_input(r, "gone", crowd, entries)
        k = Keys("gone")
        procs.append(spawn(server.url, "gone", tmp_path / "a.log", batch=2, consumer="w-a"))
        wait_for(lambda: int(r.hget(k.meta, "seq") or 0) >= 3, 30, "the first worker to commit")
        procs.append(spawn(server.url, "gone", tmp_path / "b.log", batch=2, consumer="w-b"))
        wait_for(lambda: "another worker holds the namespace" in (tmp_path / "b.log").read_text()
                 or procs[1].poll() is not None, 30, "the second worker to wait")
        assert procs[1].poll() is None
        server.restart()  # no persistence: every key is gone
        wait_for(lambda: all(p.poll() is not None for p in procs), 10, "both workers to stop")
        assert [p.returncode for p in procs] == [3, 3]
        assert "refusing to start over" in (tmp_path / "b.log").read_text()
        assert server.client().keys("*") == []  # nothing was created afresh
    finally:
        for p in procs:
            if p.poll() is None:
                p.kill()
                p.wait(10)
        server.cleanup()
