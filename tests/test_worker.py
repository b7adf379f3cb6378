"""The worker against a real redis-server: closed loop, packing, dead letters, dedup, restarts."""

from __future__ import annotations

import os
import subprocess
import sys
import time
from pathlib import Path
from typing import Any

import msgpack
import numpy as np
import pytest
import redis
from hypothesis import example, given
from hypothesis import settings as search
from hypothesis import strategies as st

from streamgroup.client import Client
from streamgroup.core.types import Answer
from streamgroup.errors import StateError
from streamgroup.keys import GROUP, Keys
from streamgroup.serve.metrics import WorkerMetrics
from streamgroup.settings import Settings
from streamgroup.sim.crowd import Crowd
from streamgroup.stream import batch as batch_mod
from streamgroup.stream import worker as worker_mod
from streamgroup.stream.adapter import SimAdapter
from streamgroup.stream.codec import answer_fields, pack_answer_columns, pack_answers
from streamgroup.stream.recovery import load_state
from streamgroup.stream.state import OP_ANSWER_COLUMNS, OP_KEY_COLUMNS, OP_QIDS, Batch
from streamgroup.stream.worker import EXIT_STATE, Worker
from tests.redisproc import RedisProc

pytestmark = pytest.mark.redis

NS = "t"
K = Keys(NS)


def settings(url: str, **kw: Any) -> Settings:
    base: dict[str, Any] = dict(redis=url, ns=NS, consumer="w1", metrics_addr="", block_ms=20,
                                batch=100, snapshot_every=0.05, history_every=0.05)
    base.update(kw)
    return Settings(**base)


def push_items(r: redis.Redis, keys: list[str]) -> None:
    pipe = r.pipeline(transaction=False)
    for k in keys:
        pipe.xadd(K.items, {"key": k})
    pipe.execute()


def assign(r: redis.Redis) -> dict[str, dict[str, Any]]:
    return {k.decode(): msgpack.unpackb(v) for k, v in r.hgetall(K.assign).items()}


def meta(r: redis.Redis) -> dict[str, str]:
    return {k.decode(): v.decode() for k, v in r.hgetall(K.meta).items()}


def errors_vs_truth(crowd: Crowd, rec: dict[str, dict[str, Any]]) -> int:
    """Misplaced items, up to the naming of the two sides (labels are arbitrary)."""
    placed = [k for k, v in rec.items() if v["status"] == "placed"]
    agree = sum((rec[k]["side"] == "1") == bool(crowd.side_of(k)) for k in placed)
    return min(agree, len(placed) - agree)


def closed_loop(url: str, n: int, *, pack: bool, timeout: float = 60.0, **kw: Any
                ) -> tuple[Worker, SimAdapter, Crowd]:
    r = redis.Redis.from_url(url)
    crowd = Crowd(n, delta=0.6, sources=[0.6] * 20, seed=3)
    push_items(r, crowd.keys)
    w = Worker(settings(url, pack_questions=pack, **kw), WorkerMetrics())
    adapter = SimAdapter(r, NS, crowd, pack=pack, aid_prefix="sim-")

    def turn(wk: Worker) -> bool:
        adapter.step()
        return wk.state is not None and wk.state.engine.done()

    assert w.run_until(turn, timeout), w.state.engine.stats() if w.state else None
    return w, adapter, crowd


def test_closed_loop_places_every_item_accurately(redis_url: str) -> None:
    """The crowd answers the worker's questions through the streams until all are placed."""
    w, adapter, crowd = closed_loop(redis_url, 300, pack=False)
    r = redis.Redis.from_url(redis_url)
    rec = assign(r)
    assert set(rec) == set(crowd.keys)
    assert all(v["status"] in ("placed", "unresolved") for v in rec.values())
    assert errors_vs_truth(crowd, rec) <= 2  # alpha = 1e-3 over 300 items: expect ~0.3
    m = meta(r)
    st = w.state.engine.stats()
    assert int(m["applied"]) == st["spend"]
    assert int(m["entries:answers"]) == adapter.written
    # inputs are trimmed once acknowledged; outputs exist
    assert r.xlen(K.answers) == 0 and r.xlen(K.items) == 0
    assert r.xlen(K.decisions) > 0 and r.xlen(K.history) > 0
    assert w.metrics.answers_applied._value.get() == st["spend"]
    w.close()


def test_packed_answers_and_packed_questions_close_the_loop(redis_url: str) -> None:
    """Packed questions out and packed answers in place every item, same as plain entries."""
    w, adapter, crowd = closed_loop(redis_url, 200, pack=True)
    r = redis.Redis.from_url(redis_url)
    rec = assign(r)
    assert len(rec) == 200 and errors_vs_truth(crowd, rec) <= 2
    qs = r.xrange(K.questions)
    assert qs and all(set(f) == {b"pack"} for _, f in qs)
    assert int(meta(r)["applied"]) == w.state.engine.stats()["spend"] == adapter.written
    w.close()


def test_question_column_packs_close_the_loop_and_read_like_packs_of_maps(
        redis_url: str) -> None:
    """With question_columns each question pack is a map of arrays; readers see the same."""
    from streamgroup.client import decode_questions

    w, adapter, crowd = closed_loop(redis_url, 200, pack=True, question_columns=True)
    r = redis.Redis.from_url(redis_url)
    rec = assign(r)
    assert len(rec) == 200 and errors_vs_truth(crowd, rec) <= 2
    qs = r.xrange(K.questions)
    packs = [msgpack.unpackb(f[b"pack"], raw=False) for _, f in qs]
    assert packs and all(isinstance(p, dict) and set(p) == {"qid", "a", "b", "why", "ts"}
                         for p in packs)
    rows = [q for _, f in qs for q in decode_questions(f)]  # as Client.questions() reads
    assert len(rows) == sum(len(p["qid"]) for p in packs)
    assert len(rows) == sum(w.state.engine.stats()["issued"].values())
    assert rows[0] == {k: packs[0][k][0] for k in ("qid", "a", "b", "why", "ts")}
    w.close()


def test_column_packs_of_key_rows_close_the_loop_and_replay_exactly(redis_url: str) -> None:
    """Column packs of keys of one length (read into key rows, no string per answer) place
    every item; the journal holds them by qid (each answer holds its question's keys), and
    the state rebuilt from the snapshot and that journal is exactly the running worker's."""
    r = redis.Redis.from_url(redis_url)
    crowd = Crowd(200, delta=0.6, sources=[0.6] * 20, seed=3)
    push_items(r, crowd.keys)
    cfg = settings(redis_url, pack_questions=True, question_columns=True, snapshot_every=3600)
    w = Worker(cfg, WorkerMetrics())
    adapter = SimAdapter(r, NS, crowd, pack=True, columns=True, aid_prefix="sim-")

    def turn(wk: Worker) -> bool:
        adapter.step()
        return wk.state is not None and wk.state.engine.stats()["spend"] >= 600

    assert w.run_until(turn, 60)
    ops = [op for _, f in r.xrange(K.journal) for op, _ in Batch.from_journal(f[b"b"]).ops]
    assert ops.count(OP_QIDS) >= 3 and OP_ANSWER_COLUMNS not in ops
    assert w.state is not None
    again = load_state(r, K, cfg)
    assert again.engine.snapshot() == w.state.engine.snapshot() and again.seq == w.state.seq

    def done(wk: Worker) -> bool:
        adapter.step()
        return wk.state is not None and wk.state.engine.done()

    assert w.run_until(done, 60)
    rec = assign(r)
    assert len(rec) == 200 and errors_vs_truth(crowd, rec) <= 2
    assert int(meta(r)["applied"]) == w.state.engine.stats()["spend"] == adapter.written
    w.close()


def test_malformed_entries_go_dead_and_good_ones_apply(redis_url: str) -> None:
    """Bad entries become dead letters with reason and origin; neighbours are applied."""
    r = redis.Redis.from_url(redis_url)
    push_items(r, ["shard-000001", "shard-000002", "shard-000003"])
    r.xadd(K.items, {"kee": "shard-9"})
    r.xadd(K.items, {"key": "shard-000004", "side": "north"})
    r.xadd(K.items, {"key": "shard-000005", "side": "south"})
    r.xadd(K.items, {"key": "shard-000006", "side": "east"})  # a third group: engine reject
    good = r.xadd(K.answers, answer_fields(Answer("shard-000001", "shard-000004", True, "s")))
    bad_same = r.xadd(K.answers, {"a": "shard-000001", "b": "shard-000002", "same": "maybe"})
    bad_qid = r.xadd(K.answers, answer_fields(Answer("shard-000001", "shard-000002", True, "s",
                                                     "99999")))
    r.xadd(K.answers, {"pack": b"\xc1\xc1"})
    pack = pack_answers([Answer("shard-000002", "shard-000005", False, "s"),
                         Answer("shard-000003", "shard-000003", True, "s")])
    packed = r.xadd(K.answers, {"pack": pack})
    w = Worker(settings(redis_url), WorkerMetrics())
    assert w.run_until(lambda wk: r.xlen(K.answers) == 0 and r.xlen(K.items) == 0, 10)
    dead = {f[b"origin"].decode(): f for _, f in r.xrange(K.dead)}
    A = K.answers
    assert f"{A} {bad_same.decode()}" in dead and f"{A} {bad_qid.decode()}" in dead
    assert b"same must be 1 or 0" in dead[f"{A} {bad_same.decode()}"][b"reason"]
    assert b"qid" in dead[f"{A} {bad_qid.decode()}"][b"reason"]
    assert f"{A} {packed.decode()}#1" in dead
    assert any(b"third group" in f[b"reason"] for f in dead.values())
    assert len(dead) == 6
    m = meta(r)
    assert int(m["applied"]) == 2  # the good plain answer and the good packed element
    assert f"{A} {good.decode()}" not in dead
    rec = assign(r)
    assert rec["shard-000004"]["pinned"] and rec["shard-000004"]["side"] == "north"
    assert "shard-000006" not in rec
    rej = w.metrics.entries_rejected
    assert rej.labels(stream="answers", reason="unknown_qid")._value.get() == 1
    assert rej.labels(stream="items", reason="engine")._value.get() == 1
    w.close()


def test_repeats_are_counted_as_duplicates_not_applied(redis_url: str) -> None:
    """A repeated aid, a second answer to one qid and a repeated (pair, source) count once."""
    r = redis.Redis.from_url(redis_url)
    push_items(r, [f"shard-{i:06d}" for i in range(6)])
    a = Answer("shard-000000", "shard-000001", True, "s1")
    r.xadd(K.answers, answer_fields(a, "p-1"))
    r.xadd(K.answers, answer_fields(a, "p-1"))  # producer retry: same aid
    r.xadd(K.answers, answer_fields(a, "p-2"))  # same pair, same source: persistent noise
    w = Worker(settings(redis_url), WorkerMetrics())
    assert w.run_until(lambda wk: r.xlen(K.answers) == 0, 10)
    m = meta(r)
    assert (m["applied"], m["dup:aid"], m["dup:pair_source"]) == ("1", "1", "1")
    # the aid is remembered across a restart (it is rebuilt from snapshot + journal)
    w.close()
    r.xadd(K.answers, answer_fields(Answer("shard-000002", "shard-000003", True, "s1"), "p-1"))
    w2 = Worker(settings(redis_url, snapshot_every=3600), WorkerMetrics())
    assert w2.run_until(lambda wk: r.xlen(K.answers) == 0, 10)
    assert meta(r)["dup:aid"] == "2"
    assert w2.metrics.answers_duplicate.labels(kind="aid")._value.get() == 1
    w2.close()


def test_second_answer_to_a_question_is_a_qid_duplicate(redis_url: str) -> None:
    """Two sources answering the same qid: the first counts, the second is a duplicate."""
    r = redis.Redis.from_url(redis_url)
    push_items(r, [f"shard-{i:06d}" for i in range(40)])
    w = Worker(settings(redis_url), WorkerMetrics())
    assert w.run_until(lambda wk: r.xlen(K.questions) > 0, 10)
    _, f = r.xrange(K.questions, count=1)[0]
    qa, qb, qid = f[b"a"].decode(), f[b"b"].decode(), f[b"qid"].decode()
    r.xadd(K.answers, answer_fields(Answer(qa, qb, True, "s1", qid)))
    r.xadd(K.answers, answer_fields(Answer(qa, qb, False, "s2", qid)))
    assert w.run_until(lambda wk: r.xlen(K.answers) == 0, 10)
    m = meta(r)
    assert (m["applied"], m["dup:qid"]) == ("1", "1")
    w.close()


def _run_steps(url: str, n: int, *, seed: int, steps: int, **kw: Any
               ) -> tuple[redis.Redis, Worker]:
    """A worker over ``n`` items, answered by a simulated crowd for ``steps`` adapter
    steps; returns a client and the (still open) worker."""
    r = redis.Redis.from_url(url)
    crowd = Crowd(n, delta=0.6, sources=[0.6] * 10, seed=seed)
    push_items(r, crowd.keys)
    w = Worker(settings(url, **kw))
    adapter = SimAdapter(r, NS, crowd)
    done = {"n": 0}

    def some(wk: Worker) -> bool:
        adapter.step()
        done["n"] += 1
        return done["n"] > steps

    w.run_until(some, 30)
    return r, w


def test_restart_resumes_exactly_from_snapshot_and_journal(redis_url: str) -> None:
    """A new worker rebuilds the same engine state from the snapshot plus the journal."""
    # snapshots every 0.05 s give a mix of snapshot and journal at the end
    r, w = _run_steps(redis_url, 150, seed=5, steps=40, batch=20)
    before = w.state.engine.stats(), w.state.seq, dict(w.state.counters)
    assert r.exists(K.journal) or r.exists(K.snapshot)
    w.close()
    w2 = Worker(settings(redis_url, batch=20))
    w2.start()
    assert (w2.state.engine.stats(), w2.state.seq, dict(w2.state.counters)) == before
    for col in ("shown_side", "shown_status"):
        assert (w2.state.engine.items.view(col) == w.state.engine.items.view(col)).all()
    w2.close()


def _wave_scene(redis_url: str, monkeypatch) -> tuple[redis.Redis, Crowd, SimAdapter]:
    """120 items pushed and a crowd adapter, where each refit's look at every item changes
    every record and a batch publishes 7 of the records left over (in service a wave is
    thousands of records)."""
    from streamgroup.core.engine import Engine

    monkeypatch.setattr(batch_mod, "publish_extra", lambda answers, items, questions: 7)
    real_decide = Engine._decide

    def decide(self: Engine, touched: Any, ordered: bool = False) -> None:
        real_decide(self, touched, ordered)
        if self._marking_later:  # a refit's look: every record changes
            self._mark_dirty(np.arange(len(self.keys)))

    monkeypatch.setattr(Engine, "_decide", decide)
    r = redis.Redis.from_url(redis_url)
    crowd = Crowd(120, delta=0.6, sources=[0.6] * 10, seed=8)
    push_items(r, crowd.keys)
    return r, crowd, SimAdapter(r, NS, crowd)


def _records_are_the_engines(r: redis.Redis, w: Worker, keys: list[str]) -> None:
    from streamgroup.stream.commit import assign_value

    stored = r.hgetall(K.assign)
    assert len(stored) == len(keys)
    for k in keys:  # (llr as it was at the record's last change: a refit that moves every
        # item's evidence a little does not republish every record)
        got, want = msgpack.unpackb(stored[k.encode()]), msgpack.unpackb(
            assign_value(w.state.engine.record(k)))
        assert {**got, "llr": 0} == {**want, "llr": 0}, (k, got, want)


def test_a_wave_of_changed_records_goes_out_over_several_batches(redis_url: str,
                                                                monkeypatch) -> None:
    """The records a refit's look at every item changes go out a few with each batch
    after, and across a restart that replays the journal (which must take the same records
    as the batches published): in the end every item's record in {NS}:assign is the
    engine's."""
    r, crowd, adapter = _wave_scene(redis_url, monkeypatch)
    slow_snapshots = dict(batch=50, snapshot_every=60)  # a restart replays the journal
    w = Worker(settings(redis_url, **slow_snapshots))
    left = {"most": 0}

    def mid_wave(wk: Worker) -> bool:
        adapter.step()
        n = wk.state.engine.unpublished() if wk.state is not None else 0
        left["most"] = max(left["most"], n)
        return n > 30

    assert w.run_until(mid_wave, 30)
    while w._held is not None:  # (the last batch's commit: in)
        w.step()
    w.close()  # records left to publish: the next worker must publish them
    w2 = Worker(settings(redis_url, **slow_snapshots))
    w2.start()  # the replay left over what the first worker's batches left over
    assert w2.state.seq == w.state.seq
    assert w2.state.engine.unpublished() == w.state.engine.unpublished() > 0
    assert np.array_equal(w2.state.engine.items.view("dirty"),
                          w.state.engine.items.view("dirty"))

    def all_out(wk: Worker) -> bool:
        adapter.step()
        return (wk.state is not None and wk.state.engine.done()
                and not wk.state.engine.unpublished() and wk._held is None)

    assert w2.run_until(all_out, 60)
    _records_are_the_engines(r, w2, crowd.keys)
    assert left["most"] > 30  # a wave was left over (the checks above are not vacuous)
    w2.close()


def test_records_left_over_go_out_when_no_input_comes(redis_url: str, monkeypatch) -> None:
    """A wave left over when the answers stop is published by empty batches of the worker's
    own: with no input, no question to plan and no restart, every record reaches
    {NS}:assign within a few turns, and none of those turns reads an entry."""
    r, crowd, adapter = _wave_scene(redis_url, monkeypatch)
    w = Worker(settings(redis_url, batch=50))

    def mid_wave(wk: Worker) -> bool:
        adapter.step()
        return wk.state is not None and wk.state.engine.unpublished() > 30

    assert w.run_until(mid_wave, 30)  # the answers stop here: the adapter is not stepped
    monkeypatch.setattr(Worker, "_worth_planning", lambda self: False)  # no planning turns
    while w.step():  # the answers already on the stream
        pass
    w._flush()  # nothing in flight: the next read decides alone whether to wait for input
    blocks: list[int | None] = []
    real_read = worker_mod.read_command

    def read_command(consumer: str, streams: Any, ids: str, count: int,
                     block: int | None) -> Any:
        blocks.append(block)
        return real_read(consumer, streams, ids, count, block)

    monkeypatch.setattr(worker_mod, "read_command", read_command)
    left, read, t0 = w.state.engine.unpublished(), 0, time.monotonic()
    assert left > 14  # still a wave to publish (the checks below are not vacuous)
    while (w.state.engine.unpublished() or w._held is not None) and time.monotonic() - t0 < 10:
        read += w.step()
    assert read == 0 and w.state.engine.unpublished() == 0 and w._held is None
    assert blocks and blocks[0] is None  # no read waited for input while records were left
    _records_are_the_engines(r, w, crowd.keys)
    w.close()


def test_a_restart_counts_the_stored_journal_and_snapshot_against_the_journal_bound(
        redis_url: str) -> None:
    """The journal left in Redis (replayed, still there) and the snapshot under it are where
    a restarted worker's journal bound starts from, not zero: the bound on the journal's
    memory and replay time holds across restarts."""
    r, w = _run_steps(redis_url, 150, seed=5, steps=20, batch=20, snapshot_every=3600)
    w.close()
    stored = sum(len(f[b"b"]) for _, f in r.xrange(K.journal))
    assert stored > 0
    w2 = Worker(settings(redis_url, batch=20, snapshot_every=3600))
    w2.start()
    assert w2._journal_bytes == stored and w2._snapshot_bytes == len(r.get(K.snapshot))
    w2.close()


def test_state_without_epoch_is_refused(redis_url: str) -> None:
    """Assignments without the epoch key stop the worker with a StateError, not a reset."""
    r = redis.Redis.from_url(redis_url)
    r.hset(K.assign, "shard-1", msgpack.packb({"side": "0"}))
    w = Worker(settings(redis_url))
    with pytest.raises(StateError, match="no epoch"):
        w.start()
    assert w.run() == EXIT_STATE
    r.delete(K.assign)
    w = Worker(settings(redis_url))
    w.start()
    w.close()
    r.delete(K.snapshot)
    with pytest.raises(StateError, match="no snapshot"):
        Worker(settings(redis_url)).start()


@pytest.mark.parametrize("hold_ms, reads", [(1000.0, 400), (0.001, 100)])
def test_reads_are_sized_by_the_time_redis_spends_on_each_transaction(
        redis_url: str, hold_ms: float, reads: int) -> None:
    """With room to spare in the hold time, reads grow from 100 entries to the whole batch
    (400); with none, they stay at 100. Each timed transaction is observed in the
    metrics, and every item is registered either way."""
    r = redis.Redis.from_url(redis_url)
    push_items(r, [f"shard-{i:06d}" for i in range(4000)])
    m = WorkerMetrics()
    w = Worker(settings(redis_url, batch=400, hold_ms=hold_ms, snapshot_every=60), m)
    assert w.run_until(lambda wk: r.xpending(K.items, GROUP)["pending"] == 0
                       and r.xlen(K.items) == 0, 30)
    assert len(assign(r)) == 4000
    assert w.sizer.count == reads
    assert m.registry.get_sample_value("streamgroup_read_entries") == reads
    timed = m.registry.get_sample_value("streamgroup_commit_redis_seconds_count")
    assert timed is not None and w.batches - 2 <= timed <= w.batches  # the first snapshots
    if reads == 400:
        assert w.batches <= 4000 / 400 + 4  # a few short reads while it grows
    else:
        assert w.batches >= 4000 / 100
    w.close()


def test_idle_entries_of_a_dead_consumer_are_claimed(redis_url: str) -> None:
    """Entries pending at a vanished consumer are claimed after claim_idle and applied."""
    r = redis.Redis.from_url(redis_url)
    push_items(r, [f"shard-{i:06d}" for i in range(5)])
    w = Worker(settings(redis_url, consumer="w1", claim_idle=0.05))
    w.start()  # creates the group
    r.xreadgroup(GROUP, "ghost", {K.items: ">"}, count=100)  # the ghost dies holding them
    assert r.xpending(K.items, GROUP)["pending"] == 5
    assert w.run_until(lambda wk: r.xpending(K.items, GROUP)["pending"] == 0, 10)
    assert len(assign(r)) == 5 and meta(r)["items_applied"] == "5"
    # the emptied ghost is dropped from the group once idle, so restarts do not pile up
    assert w.run_until(lambda wk: all(c["name"] != b"ghost"
                                      for c in r.xinfo_consumers(K.items, GROUP)), 10)
    w.close()


def test_idle_entries_are_claimed_while_the_worker_is_busy(redis_url: str) -> None:
    """Claims run on schedule under a steady load too, not only once the input runs dry."""
    r = redis.Redis.from_url(redis_url)
    total = 20_000
    push_items(r, [f"shard-{i:06d}" for i in range(total)])
    w = Worker(settings(redis_url, consumer="w1", claim_idle=0.05, batch=50))
    assert w.run_until(lambda wk: int(meta(r).get("items_applied", 0)) >= 500, 30)
    grabbed = r.xreadgroup(GROUP, "ghost", {K.items: ">"}, count=5)  # then it dies
    keys = [f[b"key"].decode() for _, f in grabbed[0][1]]
    assert len(keys) == 5

    def ghosts_placed(wk: Worker) -> bool:
        return wk.state is not None and all(wk.state.engine.record(k) is not None
                                            for k in keys)

    assert w.run_until(ghosts_placed, 30)
    assert int(meta(r)["items_applied"]) < total  # long before the stream ran dry
    assert w.run_until(lambda wk: int(meta(r)["items_applied"]) == total, 60)
    assert r.xpending(K.items, GROUP)["pending"] == 0
    w.close()


def test_lost_connection_loses_nothing(redis_url: str) -> None:
    """Killing the worker's connection mid-run: it reconnects, reloads and counts all once."""
    r = redis.Redis.from_url(redis_url)
    crowd = Crowd(200, delta=0.6, sources=[0.6] * 20, seed=9)
    push_items(r, crowd.keys)
    w = Worker(settings(redis_url, batch=20), WorkerMetrics())
    adapter = SimAdapter(r, NS, crowd)
    kills = {"n": 0, "t": 0}

    def turn(wk: Worker) -> bool:
        adapter.step()
        kills["t"] += 1
        if kills["n"] < 5 and kills["t"] % 7 == 0:
            r.client_kill_filter(_type="normal", skipme=True)
            kills["n"] += 1
        return wk.state is not None and wk.state.engine.done()

    assert w.run_until(turn, 60)
    assert w.retries >= 5 and w.metrics.redis_retries._value.get() >= 5
    m = meta(r)
    assert int(m["entries:answers"]) == adapter.written
    assert int(m["applied"]) + int(m.get("dup:qid", 0)) + int(m.get("dup:pair_source", 0)) \
        == adapter.written
    assert len(set(adapter.qids)) == len(adapter.qids)  # no question was published twice
    w.close()


def test_history_samples_are_written(redis_url: str) -> None:
    """Progress samples land in {NS}:history with the documented fields."""
    r = redis.Redis.from_url(redis_url)
    push_items(r, [f"shard-{i:06d}" for i in range(30)])
    w = Worker(settings(redis_url))
    assert w.run_until(lambda wk: r.xlen(K.history) >= 2, 10)
    _, f = r.xrange(K.history)[-1]
    assert set(f) == {b"ts", b"placed", b"asking", b"waiting", b"unresolved", b"spend",
                      b"outstanding"}
    assert abs(int(f[b"ts"]) - time.time() * 1000) < 60_000
    w.close()


def test_inputs_are_trimmed_only_once_every_group_acknowledged(redis_url: str) -> None:
    """Another group on {NS}:answers keeps its unread entries; they go once it acks them."""
    r = redis.Redis.from_url(redis_url)
    push_items(r, [f"shard-{i:06d}" for i in range(4)])
    r.xgroup_create(K.answers, "audit", id="0", mkstream=True)
    for i in range(3):
        r.xadd(K.answers, answer_fields(Answer("shard-000000", f"shard-00000{i + 1}", True,
                                               f"s{i}")))
    w = Worker(settings(redis_url))
    assert w.run_until(lambda wk: wk.state.counters["entries:answers"] == 3, 10)
    assert r.xlen(K.answers) == 3  # the audit group has not read them yet
    got = r.xreadgroup("audit", "a1", {K.answers: ">"}, count=2)
    r.xack(K.answers, "audit", *[e[0] for e in got[0][1]])
    r.xadd(K.answers, answer_fields(Answer("shard-000001", "shard-000002", True, "s9")))
    assert w.run_until(lambda wk: wk.state.counters["entries:answers"] == 4, 10)
    # kept: the one audit has not read, and the newest (audit has not read it either)
    assert [f[b"source"] for _, f in r.xrange(K.answers)] == [b"s2", b"s9"]
    w.close()


@pytest.mark.parametrize("packer", [pack_answers, pack_answer_columns])
def test_big_packs_are_split_into_batches_of_bounded_answers(redis_url: str, packer: Any
                                                             ) -> None:
    """Packs read together are processed a few at a time, under the answer cap, all once
    (column packs too: their answers count, not the entry)."""
    r = redis.Redis.from_url(redis_url)
    keys = [f"shard-{i:06d}" for i in range(80)]
    push_items(r, keys)
    for p in range(10):
        r.xadd(K.answers, {"pack": packer([
            Answer(keys[j], keys[j + 1 + p], j % 2 == 0, f"s{p}") for j in range(30)])})
    w = Worker(settings(redis_url))
    w.start()
    w._max_answers = 50  # a pack of 30 answers: one pack per batch
    sizes = []

    def turn(wk: Worker) -> bool:
        before = wk.state.counters["entries:answers"]
        sizes.append(before)
        return before == 10

    assert w.run_until(turn, 10)
    steps = [b - a for a, b in zip(sizes, sizes[1:], strict=False) if b > a]
    assert max(steps) == 1 and len(steps) == 10
    assert meta(r)["applied"] == "300" and r.xlen(K.answers) == 0
    w.close()


def test_changed_engine_settings_warn_and_keep_the_committed_ones(redis_url: str) -> None:
    """A restart with another alpha logs the difference; the committed engine config stays."""
    from structlog.testing import capture_logs

    w = Worker(settings(redis_url, alpha=1e-3))
    w.start()
    w.close()
    w2 = Worker(settings(redis_url, alpha=1e-2))
    with capture_logs() as logs:
        w2.start()
    w2.close()
    warn = [e for e in logs if e["log_level"] == "warning" and "differ" in e["event"]]
    assert warn and warn[0]["differ"] == {"alpha": {"committed": 1e-3, "given": 1e-2}}
    assert w2.state.engine.config.alpha == 1e-3


def test_an_answer_refused_only_in_company_cannot_jam_a_batch(monkeypatch) -> None:
    """If the engine refuses a batch that passed validation, answers go in one by one and
    the one it refuses alone becomes a dead letter (no Redis needed)."""
    from streamgroup.core.engine import Engine
    from streamgroup.errors import EngineInputError
    from streamgroup.stream.batch import process
    from streamgroup.stream.state import WorkerState

    real = Engine.add_answer_columns

    def picky(self, cols, now_ms=0):  # stands in for a limit only a whole batch crosses
        if "poison" in cols.source:
            raise EngineInputError("answer 0: too many sources")
        return real(self, cols, now_ms)

    monkeypatch.setattr(Engine, "add_answer_columns", picky)
    st = WorkerState.fresh(Settings().engine_config(), "e", 100)
    entries = [(f"{i}-0".encode(), {b"a": f"k{i}".encode(), b"b": f"k{i + 1}".encode(),
                                    b"same": b"1", b"source": src.encode()})
               for i, src in enumerate(["s1", "poison", "s2"])]
    out = process(st, K.items, [], K.answers, entries, 1000)
    assert out.counts["applied"] == 2 and out.counts["dead:engine"] == 1
    assert [d.origin for _, d in out.dead] == [f"{K.answers} 1-0"]
    assert [op for op, _ in out.batch.ops] == ["a", "a"]  # replay repeats the same calls


def test_replay_keeps_the_later_of_two_journal_entries_for_one_batch(redis_url: str) -> None:
    """A transaction cut short by a power cut can come back at a later load of Redis's AOF,
    in front of the worker's redo of the same batch: the journal then holds two entries
    with one batch number. Replay keeps the later one (the batches after it were built on
    it), and the state equals the one the worker had."""
    from streamgroup.stream.state import Batch

    r, w = _run_steps(redis_url, 120, seed=7, steps=30, batch=20, snapshot_every=3600)
    want = w.state.engine.stats(), w.state.seq, dict(w.state.counters)
    w.close()
    rows = r.xrange(K.journal)
    assert len(rows) > 4
    batches = [Batch.from_journal(f[b"b"]) for _, f in rows]
    at = len(batches) // 2
    stale = Batch(batches[at].seq, batches[at].now_ms, [["i", [["stale-item", None]]]])
    r.delete(K.journal)
    for b in [*batches[:at], stale, *batches[at:]]:
        r.xadd(K.journal, {"b": b.journal_bytes()})
    w2 = Worker(settings(redis_url, batch=20, snapshot_every=3600))
    w2.start()
    assert "stale-item" not in w2.state.engine.keys
    assert (w2.state.engine.stats(), w2.state.seq, dict(w2.state.counters)) == want
    w2.close()


def test_replay_reads_compressed_and_plain_journal_entries(redis_url: str) -> None:
    """Journal entries of 4 KiB and more are stored zstd-compressed; a journal that mixes
    them with plain msgpack entries (written by a worker from before) replays to the same
    state, and an entry that is cut short stops the start with a StateError."""
    import zstandard

    from streamgroup.stream.state import JOURNAL_COMPRESS_FROM, ZSTD_MAGIC

    r, w = _run_steps(redis_url, 120, seed=5, steps=30, batch=20, snapshot_every=3600)
    want = w.state.engine.stats(), w.state.seq, dict(w.state.counters)
    w.close()
    stored = [f[b"b"] for _, f in r.xrange(K.journal)]
    assert len(stored) > 4
    assert all(b.startswith(ZSTD_MAGIC) or len(b) < JOURNAL_COMPRESS_FROM for b in stored)
    plain = [zstandard.ZstdDecompressor().decompress(b) if b.startswith(ZSTD_MAGIC) else b
             for b in stored]
    mixed = [zstandard.ZstdCompressor(level=1).compress(b) if i % 2 else b
             for i, b in enumerate(plain)]
    r.delete(K.journal)
    for b in mixed:
        r.xadd(K.journal, {"b": b})
    w2 = Worker(settings(redis_url, batch=20, snapshot_every=3600))
    w2.start()
    assert (w2.state.engine.stats(), w2.state.seq, dict(w2.state.counters)) == want
    w2.close()
    r.delete(K.journal)
    r.xadd(K.journal, {"b": mixed[1][:-8]})
    with pytest.raises(StateError, match="does not decompress"):
        load_state(r, K, settings(redis_url, batch=20))


def test_large_journal_entries_are_compressed() -> None:
    """A batch of 2,000 key-row answers takes less than a third of its msgpack size in the
    journal and reads back the same; a small batch stays plain msgpack."""
    from streamgroup.core.types import KeyRowAnswers
    from streamgroup.stream.state import ZSTD_MAGIC, key_columns_payload

    n = 2000
    rows = np.frombuffer("".join(f"shard-{i:06d}" for i in range(2 * n)).encode(),
                         dtype=np.uint8).reshape(2 * n, 12)
    k = KeyRowAnswers(rows[:n], rows[n:], np.arange(n) % 3 == 0,
                      [f"src-{i % 50:03d}" for i in range(n)], np.arange(n, dtype=np.int64))
    big = Batch(7, 1000, [[OP_KEY_COLUMNS, key_columns_payload(k)]],
                [f"a{i}" for i in range(n)])
    data = big.journal_bytes()
    raw = msgpack.packb({"v": 1, "s": 7, "t": 1000, "ops": big.ops, "aids": big.aids,
                         "c": {}}, use_bin_type=True)
    assert data.startswith(ZSTD_MAGIC) and len(data) < len(raw) / 3
    back = Batch.from_journal(data)
    assert (back.seq, back.aids) == (7, big.aids)
    assert msgpack.packb(back.ops, use_bin_type=True) == msgpack.packb(big.ops,
                                                                        use_bin_type=True)
    small = Batch(8, 1000, [["i", [["x", None]]]])
    assert small.journal_bytes() == msgpack.packb(
        {"v": 1, "s": 8, "t": 1000, "ops": small.ops, "aids": [], "c": {}}, use_bin_type=True)


def _key_rows(texts: list[str]) -> Any:
    return np.frombuffer("".join(texts).encode(), dtype=np.uint8).reshape(len(texts), -1)


@search(max_examples=60, deadline=None)
@given(st.integers(1, 40), st.integers(1, 9), st.lists(st.integers(0, 2**40), min_size=1,
                                                         max_size=40))
def test_key_column_payload_reads_back_what_was_written(n: int, width: int,
                                                        qids: list[int]) -> None:
    """Keys column by column and qids as steps (op k) read back as the same rows, flags,
    sources and qids, whatever the width, the order of the qids or a key's bytes."""
    from streamgroup.core.types import KeyRowAnswers
    from streamgroup.stream.state import key_columns_from_payload, key_columns_payload

    rng = np.random.default_rng(n * 100 + width)
    a, b = (rng.integers(1, 256, (n, width)).astype(np.uint8) for _ in range(2))
    qn = np.resize(np.array(qids, dtype=np.int64), n)
    k = KeyRowAnswers(a, b, rng.integers(0, 2, n).astype(bool),
                      [f"s{i % 3}" for i in range(n)], qn)
    back = key_columns_from_payload(msgpack.unpackb(
        msgpack.packb(key_columns_payload(k), use_bin_type=True), raw=False))
    assert back.a_rows.tobytes() == a.tobytes() and back.a_rows.shape == (n, width)
    assert back.b_rows.tobytes() == b.tobytes() and back.a_rows.flags.c_contiguous
    assert back.same.tolist() == k.same.tolist() and back.source == k.source
    assert back.qn.dtype == np.int64 and back.qn.tolist() == qn.tolist()


def test_key_columns_replay_like_the_key_rows_of_earlier_versions() -> None:
    """The same answers journaled as op k (this version) and as op K (what earlier versions
    wrote, still read) replay to the same engine, byte for byte, and are applied."""
    from streamgroup.core.types import EngineConfig, KeyRowAnswers
    from streamgroup.stream.state import (
        OP_KEY_ROWS,
        WorkerState,
        key_columns_payload,
        key_rows_payload,
    )

    crowd = Crowd(300, delta=0.6, sources=[0.6] * 5, seed=5)  # keys of one length
    state = WorkerState.fresh(EngineConfig(max_outstanding=10**6), "e", 1000)
    state.engine.add_items([(key, None) for key in crowd.keys])
    qc = state.engine.plan_columns(1000)  # the first questions (the bootstrap's)
    same, src = crowd.answer_keys(qc.a, qc.b)
    k = KeyRowAnswers(_key_rows(qc.a), _key_rows(qc.b), np.array(same), src,
                      np.array([int(q) for q in qc.qid], dtype=np.int64))
    start = state.snapshot_bytes(1000)
    ends = []
    for op, payload in ((OP_KEY_COLUMNS, key_columns_payload), (OP_KEY_ROWS, key_rows_payload)):
        again = WorkerState.from_snapshot(start, "e", 1000)
        again.replay(Batch.from_journal(Batch(1, 2000, [[op, payload(k)]]).journal_bytes()))
        ends.append(again.engine)
    assert len(qc) > 50 and ends[0].stats()["spend"] == len(qc)  # every answer applied
    assert ends[0].snapshot() == ends[1].snapshot()


@search(max_examples=60, deadline=None)
@given(st.lists(st.integers(0, 2**62), min_size=1, max_size=400), st.integers(1, 300))
@example([200, 72, 199], 3)  # steps at the edges of one byte: -128 and 127
@example([0, 128, 2**31 + 128], 300)
def test_qid_payload_reads_back_what_was_written(qids: list[int], sources: int) -> None:
    """Op q's qids as steps (in the fewest bytes that hold them) and its sources as codes
    into a table (1 byte up to 256 sources, else 2) read back as the same qids, flags and
    names."""
    from streamgroup.stream.state import qids_from_payload, qids_payload

    n = len(qids)
    rng = np.random.default_rng(n * 1000 + sources)
    names = [f"src-{i}" for i in range(sources)]
    src = np.arange(n, dtype=np.int64) % sources  # every name of the first n in use
    rng.shuffle(src)
    same = rng.integers(0, 2, n).astype(bool)
    payload = qids_payload(np.array(qids, dtype=np.int64), same, src, names)
    back = msgpack.unpackb(msgpack.packb(payload, use_bin_type=True), raw=False)
    qn, flags, got = qids_from_payload(back)
    assert qn.dtype == np.int64 and qn.tolist() == qids
    assert flags.tolist() == same.tolist() and got == [names[i] for i in src.tolist()]
    steps = [q - p for p, q in zip(qids, qids[1:], strict=False)] or [0]
    half = [2 ** (8 * w - 1) for w in (1, 2, 4, 8)]
    assert payload[1] == next(w for w, h in zip((1, 2, 4, 8), half, strict=True)
                              if -h <= min(steps) and max(steps) < h)
    assert payload[5] == (1 if min(n, sources) <= 256 else 2)


def _fresh_state(keys: list[str]) -> Any:
    from streamgroup.core.types import EngineConfig
    from streamgroup.stream.state import WorkerState

    state = WorkerState.fresh(EngineConfig(max_outstanding=10**6), "e", 1000)
    state.engine.add_items([(key, None) for key in keys])
    return state


def _plain_entries(a: list[str], b: list[str], same: list[bool], src: list[str],
                   qids: list[str | None]) -> list[Any]:
    out = []
    for i, (x, y, s, n, q) in enumerate(zip(a, b, same, src, qids, strict=True)):
        fields = [b"a", x.encode(), b"b", y.encode(), b"same", b"1" if s else b"0",
                  b"source", n.encode()]
        out.append([f"{i + 1}-0".encode(), fields + ([b"qid", q.encode()] if q else [])])
    return out


def test_answers_to_their_questions_are_journaled_by_qid_and_replay_exactly() -> None:
    """A batch whose every answer names its question and holds its keys as shown goes to
    the journal as op q; one answer without a qid, or with its keys the other way round,
    keeps the whole batch in op A. Both replay to the running engine byte for byte, and
    op q replays like op A of the same answers (and like op k of them as key rows)."""
    from streamgroup.core.types import KeyRowAnswers
    from streamgroup.stream.batch import process
    from streamgroup.stream.state import WorkerState, key_columns_payload

    crowd = Crowd(300, delta=0.6, sources=[0.6] * 7, seed=11)
    for case in ("asked", "no qid", "swapped"):
        state = _fresh_state(crowd.keys)
        qc = state.engine.plan_columns(1000)  # the bootstrap's questions
        start = state.snapshot_bytes(1000)
        same, src = crowd.answer_keys(qc.a, qc.b)
        a, b, qids = list(qc.a), list(qc.b), list(qc.qid)
        if case == "no qid":
            qids[5] = None
        elif case == "swapped":
            a[5], b[5] = b[5], a[5]
        out = process(state, "t:items", [], "t:answers",
                      _plain_entries(a, b, same, src, qids), 2000)
        ops = [op for op, _ in out.batch.ops]
        assert ops == ([OP_QIDS] if case == "asked" else [OP_ANSWER_COLUMNS]), case
        assert state.engine.stats()["spend"] == len(qc) > 50
        again = WorkerState.from_snapshot(start, "e", 1000)
        again.replay(Batch.from_journal(out.batch.journal_bytes()))
        assert again.engine.snapshot() == state.engine.snapshot(), case
        if case == "asked":
            rows = KeyRowAnswers(_key_rows(qc.a), _key_rows(qc.b), np.array(same), src,
                                 np.array([int(q) for q in qc.qid], dtype=np.int64))
            by_rows = WorkerState.from_snapshot(start, "e", 1000)
            by_rows.replay(Batch(1, 2000, [[OP_KEY_COLUMNS, key_columns_payload(rows)]]))
            assert by_rows.engine.snapshot() == state.engine.snapshot()


def test_a_journal_entry_that_no_longer_applies_stops_the_start_with_a_state_error() -> None:
    """Replay of an entry that cannot apply to the state before it (op q naming a question
    never issued, an answer between unknown keys that fails the checks, an op of a newer
    version) raises a StateError that names the entry: the worker exits with code 3 and
    that message rather than with a traceback."""
    from streamgroup.stream.state import qids_payload

    state = _fresh_state(["shard-000001", "shard-000002"])
    never = qids_payload(np.array([10**6]), np.array([True]), np.array([0]), ["s"])
    for ops in ([[OP_QIDS, never]], [[OP_ANSWER_COLUMNS, [["x"], ["x"], [True], ["s"],
                                                          [None]]]], [["z", []]]):
        with pytest.raises(StateError, match=r"journal entry 4 does not apply"):
            state.replay(Batch(4, 1000, ops))
    assert state.seq == 0


def test_answers_total_counts_packs_and_plain_entries() -> None:
    """The backlog cap counts a pack's answers; the shortcut for batches without packs
    gives what counting entry by entry gives."""
    from streamgroup.stream.worker import _answers_in, answers_total

    plain = [[b"1-0", [b"a", b"x", b"b", b"y", b"same", b"1", b"source", b"s", b"qid", b"4"]]]
    packed = [[b"2-0", [b"pack", pack_answers([Answer("p", "q", True, "s", None)] * 3)]]]
    gone = [[b"3-0", None]]
    columns = [[b"4-0", [b"pack", pack_answer_columns([Answer("p", "q", True, "s")] * 40)]]]
    for batch in (plain * 5, plain + packed, packed, plain + gone, gone, [], columns):
        assert answers_total(batch) == sum(map(_answers_in, batch))
    assert answers_total(plain * 5 + packed) == 8
    assert answers_total(plain + columns) == 41
    # the columns' order does not matter; a broken pack counts one (the codec rejects it)
    later = msgpack.packb({"source": ["s"] * 7, "same": [1] * 7, "a": ["p"] * 7,
                           "b": ["q"] * 7})
    assert _answers_in([b"5-0", [b"pack", later]]) == 7
    assert _answers_in([b"6-0", [b"pack", b"\x83\xa1a"]]) == 1


_RSS_AFTER_FREE = """
import sys
import numpy as np
from streamgroup.stream.worker import keep_memory
kept = keep_memory() if sys.argv[1] == "keep" else False
def rss():
    with open("/proc/self/status") as fh:
        return next(int(x.split()[1]) for x in fh if x.startswith("VmRSS:")) // 1024
before = rss()
a = np.ones(64 << 17)  # 64 MiB, written
del a
print(kept, rss() - before)
"""


@pytest.mark.skipif(not os.path.exists("/proc/self/status"), reason="reads /proc (Linux)")
def test_keep_memory_holds_what_a_batch_frees() -> None:
    """With keep_memory (glibc), 64 MiB written and freed stay in the process, ready for
    the next batch; without it the allocator hands them back to the kernel at once."""
    out = {}
    for mode in ("keep", "give"):
        run = subprocess.run([sys.executable, "-c", _RSS_AFTER_FREE, mode], check=True,
                             capture_output=True, text=True)
        kept, grown = run.stdout.split()
        out[mode] = (kept, int(grown))
    if out["keep"][0] != "True":
        pytest.skip("not glibc: keep_memory has nothing to set")
    assert out["keep"][1] >= 60, out
    assert out["give"][1] < 16, out


_NICENESS = """
import os, sys
from streamgroup.settings import Settings
from streamgroup.stream.worker import tune_process
tune_process(Settings(nice=int(sys.argv[1]), keep_memory=False))
with open("/proc/self/stat") as fh:  # the kernel's view: field 19, after the command name
    print(os.nice(0), fh.read().rpartition(")")[2].split()[16])
"""


@pytest.mark.skipif(not os.path.exists("/proc/self/stat"), reason="reads /proc (Linux)")
def test_the_worker_takes_the_niceness_it_is_given_and_never_lowers_it() -> None:
    """Setting ``nice``: the process runs at that niceness, as the kernel sees it; one
    started nicer than asked (here under nice(1) at 15) stays as nice as it was."""
    base = os.nice(0)
    if base > 7:
        pytest.skip("the test runner itself runs nicer than 7")
    seen = {}
    for prefix, want in (([], "7"), (["nice", "-n", str(15 - base)], "0"), ([], "0")):
        run = subprocess.run([*prefix, sys.executable, "-c", _NICENESS, want], check=True,
                             capture_output=True, text=True)
        seen[(bool(prefix), want)] = run.stdout.split()
    assert seen[(False, "7")] == ["7", "7"]
    assert seen[(True, "0")] == ["15", "15"]
    assert seen[(False, "0")] == [str(base), str(base)]


def test_worker_and_client_work_over_a_unix_socket(tmp_path: Path) -> None:
    """redis:// is not the only address the settings accept: with unix:// (Redis on the same
    host) the worker places items and the client reads them back, as over TCP."""
    sock = tmp_path / "redis.sock"
    proc = RedisProc(extra=["--unixsocket", str(sock), "--unixsocketperm", "700"]).start()
    try:
        url = f"unix://{sock}?db=0"
        w, _, crowd = closed_loop(url, 60, pack=True)
        client = Client(url, ns=NS)
        got = client.lookup_many(crowd.keys)
        assert all(g is not None and g["status"] == "placed" for g in got)
        assert errors_vs_truth(crowd, assign(redis.Redis.from_url(url))) <= 1
        client.close()
        w.close()
    finally:
        proc.cleanup()
