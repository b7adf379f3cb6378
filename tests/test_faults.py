"""Faults against real redis-server processes: restarts, lost data, killed and paused
connections, maxmemory. Each compares with an uninterrupted run (see tests/faultkit.py)."""

from __future__ import annotations

import pytest

from tests import faultkit

pytestmark = pytest.mark.redis


def test_redis_restart_without_data_stops_the_worker_with_exit_3() -> None:
    """Redis comes back empty mid-run: the worker exits 3 with a clear error, writes nothing."""
    res = faultkit.redis_data_lost()
    assert res.passed, res.as_dict()
    assert "is gone" in res.details["message"] and "refusing to start over" in \
        res.details["message"]


def test_killed_connections_lose_nothing() -> None:
    """CLIENT KILL TYPE normal 8 times mid-run: reconnects, same end state as no kills."""
    res = faultkit.client_kill()
    assert res.passed, res.as_dict()


def test_a_second_worker_waits_for_the_lease_and_takes_over_cleanly() -> None:
    """Two workers on one namespace: the second waits, then continues; end state equal."""
    res = faultkit.second_worker()
    assert res.passed, res.as_dict()


def test_maxmemory_refuses_whole_batches_and_the_worker_resumes_when_freed() -> None:
    """At maxmemory no batch is half applied; the worker waits (no exit) and then finishes."""
    res = faultkit.redis_maxmemory()
    assert res.passed, res.as_dict()


@pytest.mark.slow
def test_power_cut_that_rolls_back_commits_still_ends_equal() -> None:
    """AOF everysec losing its tail, not repaired: rolled-back batches are applied again,
    every answer counts as often as in an uninterrupted run, the worker finishes.

    When the cut falls inside a transaction Redis 7.0 runs the half of it that survived,
    later (see tests/faultkit.py): the output streams may repeat entries, and in rare runs
    the engine state differs slightly, so it is reported, not required equal here; the
    repaired case below requires everything equal. The guard against an older snapshot
    landing over a newer one is tested directly in tests/test_commit.py.
    """
    res = faultkit.redis_power_cut_aof()
    assert res.passed, res.as_dict()
    assert sum(res.details["batches_lost_by_kill"]) >= 1  # the cut really took commits back


@pytest.mark.slow
def test_power_cut_with_the_aof_repaired_ends_fully_equal() -> None:
    """aof-load-truncated no + redis-check-aof --fix: no half transaction, streams equal too."""
    res = faultkit.redis_power_cut_aof_checked()
    assert res.passed, res.as_dict()
    assert res.details["redis_replayed_half_transactions"] == 0


@pytest.mark.slow
def test_redis_killed_and_restarted_with_aof_loses_nothing() -> None:
    """Redis -9 and back 3 times (appendfsync always): same end state as no restarts."""
    res = faultkit.redis_restart_aof()
    assert res.passed, res.as_dict()


def test_flushed_namespace_is_never_silently_restarted() -> None:
    """FLUSHALL under a running worker: it stops, and a restarted one refuses with exit 3."""
    res = faultkit.namespace_flushed()
    assert res.passed, res.as_dict()


def test_redis_paused_and_debug_sleep_lose_nothing() -> None:
    """CLIENT PAUSE and DEBUG SLEEP mid-run: commits resume after each, same end state."""
    res = faultkit.redis_paused()
    assert res.passed, res.as_dict()
    assert all(s < 5 for s in res.details["stalls_s"])


@pytest.mark.slow
def test_redis_blocked_past_the_socket_timeout_loses_nothing() -> None:
    """DEBUG SLEEP 11 s (past the 10 s socket timeout): reconnect, reload, same end state."""
    res = faultkit.redis_paused_past_timeout()
    assert res.passed, res.as_dict()
    assert res.details["reconnects"] >= 1


@pytest.mark.slow
def test_sigkill_during_startup_and_recovery_matches_an_uninterrupted_run() -> None:
    """12 kills while loading, replaying, rereading or claiming: same end state as no kills."""
    res = faultkit.sigkill_startup()
    assert res.passed, res.as_dict()


def test_outage_shows_not_ready_but_alive_and_resumes() -> None:
    """While Redis is down the worker backs off: /healthz stays alive, /readyz says not ready."""
    import threading
    import time

    from streamgroup.serve.http import Health
    from streamgroup.settings import Settings
    from streamgroup.stream.worker import Worker

    with faultkit.server(faultkit.AOF) as srv:
        w = Worker(Settings(redis=srv.url, ns="hb", metrics_addr="", block_ms=20,
                            consumer="w1"))
        w.health = Health(stale_after=1.0)  # judged 30x faster than in production
        codes: list[int] = []
        t = threading.Thread(target=lambda: codes.append(w.run()), daemon=True)
        t.start()
        faultkit.wait_for(lambda: w.health.ready(), 10, "ready")
        srv.kill()
        faultkit.wait_for(lambda: not w.health.ready(), 10, "not ready")
        # four stale periods: without beats while backing off, the growing delays open a
        # gap of more than one period within this window
        down_until = time.monotonic() + 4.0
        while time.monotonic() < down_until:
            assert w.health.alive(), w.health.liveness()
            time.sleep(0.02)
        assert w.retries >= 2
        srv.start()
        faultkit.wait_for(lambda: w.health.ready(), 15, "ready again after the outage")
        w.request_stop()
        t.join(15)
        assert codes == [0]


def test_lag_gauge_is_set_even_when_redis_cannot_count_the_lag() -> None:
    """After an XDEL past the group's position XINFO lag is nil: the gauge still moves."""
    from streamgroup.keys import GROUP, Keys
    from streamgroup.serve.metrics import WorkerMetrics
    from streamgroup.settings import Settings
    from streamgroup.stream.progress import Progress

    k = Keys("lag")
    with faultkit.server() as srv:
        r = faultkit.probe(srv)
        for i in range(10):
            r.xadd(k.answers, {"a": "p", "b": f"q{i}", "same": "1"})
        r.xgroup_create(k.answers, GROUP, id="0")
        r.xgroup_create(k.items, GROUP, id="0", mkstream=True)
        got = r.xreadgroup(GROUP, "w1", {k.answers: ">"}, count=4)
        r.xack(k.answers, GROUP, *[e[0] for e in got[0][1]][:3])  # one stays pending
        r.xdel(k.answers, r.xrange(k.answers)[-1][0])  # a producer deletes an undelivered one
        assert [g["lag"] for g in r.xinfo_groups(k.answers)] == [None]
        prog = Progress(Settings(ns="lag"), k, 100)
        prog.metrics = WorkerMetrics()
        prog.metrics.consumer_lag.labels(stream="answers").set(1234)  # a stale earlier value
        prog._group_info(r)
        assert prog.metrics.consumer_lag.labels(stream="answers")._value.get() == 10 - 1 - 1
        assert prog.metrics.pending.labels(stream="answers")._value.get() == 1
