"""SIGTERM: the worker commits the batch in hand and exits 0; a restart continues from there."""

from __future__ import annotations

import signal
import subprocess
import time

import pytest
import redis

from streamgroup.keys import GROUP, Keys
from tests.test_crash import consumed, recorded_input, spawn, wait_for, write_input

pytestmark = [pytest.mark.redis, pytest.mark.slow]


def _started(url: str, ns: str, seed: int, batches: int, **flags: object
             ) -> tuple[redis.Redis, Keys, int, subprocess.Popen[bytes]]:
    """A recorded input of 150 items in ``ns`` and a worker (batches of 5) that has
    committed ``batches`` of it: (client, keys, answer entries in all, the worker)."""
    r = redis.Redis.from_url(url)
    crowd, entries = recorded_input(n=150, seed=seed)
    write_input(r, ns, crowd, entries)
    k = Keys(ns)
    total = r.xlen(k.answers)
    proc = spawn(url, ns, batch=5, **flags)
    wait_for(lambda: int(r.hget(k.meta, "seq") or 0) >= batches or proc.poll() is not None,
             30, "the worker to commit batches")
    return r, k, total, proc


def test_sigterm_commits_the_batch_in_hand_and_exits_zero(redis_url: str) -> None:
    """After SIGTERM mid-stream: exit 0, nothing left pending, journal folded into a snapshot."""
    r, k, total, proc = _started(redis_url, "sig", 2, 20, snapshot_every=3600)
    proc.send_signal(signal.SIGTERM)
    assert proc.wait(15) == 0
    read = int(r.hget(k.meta, "entries:answers") or 0)
    assert 0 < read < total  # stopped mid-stream
    assert r.xpending(k.answers, GROUP)["pending"] == 0
    assert r.xpending(k.items, GROUP)["pending"] == 0
    assert r.xlen(k.answers) == total - read
    assert not r.exists(k.journal) and r.exists(k.snapshot)
    proc = spawn(redis_url, "sig", batch=50)
    wait_for(lambda: consumed(r, "sig"), 60, "the restarted worker to finish the stream")
    proc.send_signal(signal.SIGTERM)
    assert proc.wait(15) == 0
    assert int(r.hget(k.meta, "entries:answers")) == total


def test_a_stop_that_cannot_finish_ends_after_the_grace_period(redis_url: str) -> None:
    """SIGTERM while Redis does not answer: the worker leaves once `grace` is over (not
    after its socket timeouts), and a restart applies what it had in hand, once."""
    r, k, total, proc = _started(redis_url, "hang", 3, 3, grace=1)
    try:
        r.execute_command("CLIENT", "PAUSE", 5000, "ALL")  # the worker's commands hang
        time.sleep(0.2)
        t0 = time.monotonic()
        proc.send_signal(signal.SIGTERM)
        assert proc.wait(10) == 128 + signal.SIGTERM
        assert time.monotonic() - t0 < 4  # the grace period, not 10 s of socket timeout
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait(10)
    proc = spawn(redis_url, "hang", batch=50)  # (it waits for the pause to end)
    wait_for(lambda: consumed(r, "hang"), 60, "the restarted worker to finish the stream")
    proc.send_signal(signal.SIGTERM)
    assert proc.wait(15) == 0
    assert int(r.hget(k.meta, "entries:answers")) == total
