"""The batch transaction as sent and read back, against a real redis-server: questions
formatted ahead as plain XADDs, a read sent before MULTI, replies read straight from the
connection (hiredis and pure-Python parsers)."""

from __future__ import annotations

import time

import hiredis
import numpy as np
import pytest
import redis
from hypothesis import given, settings
from hypothesis import strategies as st
from redis._parsers import _HiredisParser, _RESP2Parser

from streamgroup.client import decode_questions
from streamgroup.core.codes import STATUS_NAMES
from streamgroup.core.keyindex import KeyIndex
from streamgroup.core.types import QuestionColumns, RecordColumns
from streamgroup.keys import MAX_PACK_ANSWERS, QUESTION_FIELDS, Keys
from streamgroup.settings import Settings
from streamgroup.stream import commit, recovery
from streamgroup.stream.commit import (
    DECISION_FIELDS,
    Caps,
    CommitError,
    CommitPlan,
    Prepacked,
    _question_entries,
    build_commit,
    decision_values,
    execute,
    receive,
    resp_command,
    send,
    xadd_entries,
    xadd_script,
)

pytestmark = pytest.mark.redis
K = Keys("tc")
PARSERS = [pytest.param(_HiredisParser, id="hiredis"), pytest.param(_RESP2Parser, id="python")]


def _client(url: str, parser: type = _HiredisParser) -> redis.Redis:
    pool = redis.ConnectionPool.from_url(url, parser_class=parser)
    return redis.Redis(connection_pool=pool, single_connection_client=True)


def _entries(r: redis.Redis, stream: str) -> list[dict[str, str]]:
    return [{k.decode(): v.decode() for k, v in f.items()} for _, f in r.xrange(stream)]


def _columns(qids: list[str], whys: list[str], ts: list[int], b: str = "shard-{}",
             ) -> QuestionColumns:
    n = len(qids)
    return QuestionColumns(qids, [f"kiln-{i:04d}" for i in range(n)],
                           [b.format(i) for i in range(n)], whys, ts)


def _by_script(key: str, names: tuple[str, ...], vals: list[object]) -> tuple:
    """The reference: the general script that XADDs each row field by field."""
    return ("EVAL", xadd_script(names), 1, key, 0, *vals)


def _commit(r: redis.Redis, commands: list) -> list:
    plan = CommitPlan(commands)
    send(r, plan)
    return receive(r, plan)


@pytest.mark.parametrize("parser", PARSERS)
@pytest.mark.parametrize("qids, whys, ts, b", [
    ([str(q) for q in range(1200, 1207)], ["seed"] * 2 + ["place"] * 4 + ["check"], [77] * 7,
     "shard-{}"),
    (["4", "6", "7"], ["place", "check", "place"], [9, 10, 9], "shard-{}"),
    (["1", "2"], ["place"] * 2, [3, 4], "shard-é{}"),  # non-ASCII keys: byte lengths
    (["0"], ["plaçe"], [1], "shard-{}"),  # a non-ASCII why
    (["5", "8"], ["place"] * 2, [2, 2], "é" * 200 + "{}"),  # beyond the length tables
])
def test_prepacked_questions_write_what_the_field_by_field_script_writes(
        redis_url: str, parser: type, qids: list[str], whys: list[str], ts: list[int],
        b: str) -> None:
    """Questions formatted ahead as plain XADDs read back field for field as the general
    per-field script writes them, one EXEC reply (an entry id) per question."""
    r = _client(redis_url, parser)
    qc = _columns(qids, whys, ts, b)
    entries = _question_entries("{tc}:q1", 0, qc)
    assert isinstance(entries[0], Prepacked) and len(entries) == 1  # no cap: no trim
    result = _commit(r, entries)
    assert len(result) == len(qids) and all(b"-" in x for x in result)
    vals: list[object] = []
    for row in zip(qc.qid, qc.a, qc.b, qc.why, qc.ts_ms, strict=True):
        vals += row
    r.execute_command(*_by_script("{tc}:q2", QUESTION_FIELDS, vals))
    got, want = _entries(r, "{tc}:q1"), _entries(r, "{tc}:q2")
    assert got == want
    assert [e["qid"] for e in got] == qids


@pytest.mark.parametrize("parser", PARSERS)
@pytest.mark.parametrize("ns, rows", [
    ("tc", [("kiln-0001", "north", "placed", repr(3.25), 4, 0),
            ("kiln-0002", "", "unresolved", repr(-0.5), 30, 2)]),
    ("t%c", [("kiln-%d", "nörth", "placed", repr(1e-300), 7, 1)]),  # '%' and non-ASCII
    ("tc", [(f"shard-{i}", "south", "revised", repr(i / 7), i, i % 3) for i in range(300)]),
    ("tc", [("ü" * 200, "north", "placed", repr(0.5), 1, 0)]),  # beyond the length tables
])
def test_decisions_as_plain_xadds_write_what_the_script_writes(
        redis_url: str, parser: type, ns: str, rows: list[tuple]) -> None:
    """Rows formatted ahead as plain XADDs read back field for field as the per-field
    script writes them, whatever the key and values hold, one EXEC reply per row."""
    r = _client(redis_url, parser)
    vals = [v for row in rows for v in row]
    key = Keys(ns).decisions
    entries = xadd_entries(key, 0, DECISION_FIELDS, vals)
    assert isinstance(entries[0], Prepacked) and len(entries) == 1
    result = _commit(r, entries)
    assert len(result) == len(rows) and all(b"-" in x for x in result)
    r.execute_command(*_by_script("{tc}:d2", DECISION_FIELDS, vals))
    got, want = _entries(r, key), _entries(r, "{tc}:d2")
    assert got == want
    assert [tuple(e.values()) for e in got] == [tuple(map(str, row)) for row in rows]
    r.delete(key, "{tc}:d2")


def test_prepacked_questions_cap_the_stream(redis_url: str) -> None:
    """The cap adds an approximate trim after the appends."""
    r = _client(redis_url)
    n = 3000
    qc = _columns([str(q) for q in range(n)], ["place"] * n, [1] * n)
    entries = _question_entries(K.questions, 100, qc)
    assert [c.name if isinstance(c, Prepacked) else c[0] for c in entries] == ["XADD", "XTRIM"]
    result = _commit(r, entries)
    assert len(result) == n + 1
    assert r.xlen(K.questions) < n


@pytest.mark.parametrize("parser", PARSERS)
def test_a_command_sent_first_replies_before_the_transaction(redis_url: str,
                                                             parser: type) -> None:
    """``first`` goes out before MULTI: its reply is read first and EXEC's come after,
    matched to the plan's commands in order."""
    r = _client(redis_url, parser)
    r.set("{tc}:seen", b"before")
    plan = CommitPlan([("SET", "{tc}:seen", b"after"), ("INCRBY", "{tc}:n", 5)])
    send(r, plan, first=("GET", "{tc}:seen"))
    assert r.connection is not None
    assert r.connection.read_response() == b"before"
    assert receive(r, plan) == [b"OK", 5]  # raw replies, no response callbacks
    assert plan.names() == ["SET", "INCRBY"]


@pytest.mark.parametrize("parser", PARSERS)
def test_a_failing_command_is_named_and_the_connection_stays_in_step(
        redis_url: str, parser: type) -> None:
    """A command that fails inside EXEC is reported by name (a prepacked XADD counts once
    per question), and every reply of the transaction has been read: the next command on
    the connection gets its own reply."""
    r = _client(redis_url, parser)
    r.set("{tc}:q", b"not a stream")
    qc = _columns(["1", "2"], ["place"] * 2, [1, 1])
    plan = CommitPlan([("INCR", "{tc}:n"), *_question_entries("{tc}:q", 0, qc)])
    assert plan.names() == ["INCR", "XADD", "XADD"]
    send(r, plan)
    with pytest.raises(CommitError, match="XADD: WRONGTYPE"):
        receive(r, plan)
    assert r.get("{tc}:n") == b"1"  # MULTI/EXEC does not roll back: the caller reloads
    assert r.ping() is True


@pytest.mark.parametrize("parser", PARSERS)
def test_replies_of_a_large_transaction_are_read_in_full(redis_url: str, parser: type) -> None:
    """A transaction whose replies span many socket reads (20,000 queued commands) gets
    every reply in order, an error among them is named, and the connection stays in step;
    a command sent first is answered first."""
    r = _client(redis_url, parser)
    r.set("{tc}:str", b"x")
    cmds: list = [("INCR", "{tc}:big") for _ in range(20_000)]
    cmds[12_345] = ("INCR", "{tc}:str")
    plan = CommitPlan(cmds)
    send(r, plan, first=("GET", "{tc}:str"))
    assert r.connection is not None and r.connection.read_response() == b"x"
    with pytest.raises(CommitError, match="INCR: value is not an integer"):
        receive(r, plan)
    assert r.get("{tc}:big") == b"19999" and r.ping() is True
    plan = CommitPlan(cmds[:12_345])
    send(r, plan)
    assert receive(r, plan) == list(range(20_000, 32_345))


def test_an_older_snapshot_never_lands_over_a_newer_one(redis_url: str) -> None:
    """The snapshot write is guarded by the batch number it covers. A cut AOF can make
    Redis 7.0 run an old transaction's surviving commands later, in front of a newer
    one; replaying an older (or the same) batch's snapshot command then changes nothing:
    the newer snapshot, and the journal written since, stay."""
    r = _client(redis_url)
    keys = Keys("snapguard")

    def commit(blob: bytes, covers: int, journal: bytes | None = None) -> list:
        plan = build_commit(keys, Caps(), records=None, decisions=[], questions=None,
                            dead=[], journal=journal, snapshot=(blob, covers) if blob else None,
                            meta={"seq": covers}, acks={}, group="g", pack_questions=False)
        return execute(r, plan)

    assert commit(b"state after batch 7", 7)[1] == 1  # (after the SET of the newcomer)
    old = build_commit(keys, Caps(), records=None, decisions=[], questions=None, dead=[],
                       journal=None, snapshot=(b"state after batch 5", 5), meta={},
                       acks={}, group="g", pack_questions=False)
    commit(b"", 8, journal=b"batch 8")
    assert execute(r, old)[1] == 0  # the stale commands, run late
    assert commit(b"state after batch 7, again", 7)[1] == 0  # a redone batch's twin
    assert r.get(keys.snapshot) == b"state after batch 7"
    assert r.xlen(keys.journal) == 1  # batch 8's entry is still there to replay
    assert r.get(keys.snapshot_seq) == b"7"
    assert r.exists(keys.snapshot_next) == 0  # a refused newcomer is not left behind
    assert commit(b"state after batch 9", 9)[1] == 1  # a newer one goes in, journal folded
    assert r.get(keys.snapshot) == b"state after batch 9"
    assert r.exists(keys.journal) == 0


def test_a_new_namespace_drops_a_leftover_snapshot_guard(redis_url: str) -> None:
    """A namespace created afresh (its keys deleted, but a stale ``snapseq`` left) must
    not have its snapshots held back by the old batch number."""
    r = _client(redis_url)
    keys = Keys("snapfresh")
    r.set(keys.snapshot_seq, 500)
    state = recovery.load_state(r, keys, Settings(redis=redis_url, ns="snapfresh"), time.time)
    assert state.seq == 0 and r.exists(keys.snapshot_seq) == 0
    plan = build_commit(keys, Caps(), records=None, decisions=[], questions=None, dead=[],
                        journal=None, snapshot=(state.snapshot_bytes(0), 1), meta={},
                        acks={}, group="g", pack_questions=False)
    assert execute(r, plan)[1] == 1


@settings(max_examples=80, deadline=None)
@given(head=st.lists(st.text(min_size=0, max_size=20), min_size=1, max_size=3),
       args=st.lists(st.one_of(st.binary(max_size=50), st.binary(min_size=4090, max_size=4200)),
                     max_size=40))
def test_resp_command_writes_what_hiredis_writes(head: list[str], args: list[bytes]) -> None:
    """The batch's big commands (HSET of the records, XACK) are packed by one join with
    table-made length headers; byte for byte what the reference packer,
    ``hiredis.pack_command``, writes for the same command, long args included."""
    assert resp_command(tuple(head), args) == hiredis.pack_command((*head, *args))


@settings(max_examples=60, deadline=None)
@given(rows=st.lists(st.tuples(st.text(min_size=1, max_size=8), st.text(min_size=1, max_size=300),
                               st.sampled_from(["seed", "place", "check", "plaçe"]),
                               st.sampled_from([5, 77, 10**12])), min_size=1, max_size=30),
       one_time=st.booleans())
def test_question_entries_pack_what_hiredis_packs(rows: list, one_time: bool) -> None:
    """The batch's questions formatted in one go are, byte for byte, the XADDs that the
    reference packer (``hiredis.pack_command``) writes one by one, whether the batch has
    one time or several."""
    ts = [rows[0][3]] * len(rows) if one_time else [r[3] for r in rows]
    qc = QuestionColumns([str(i) for i in range(len(rows))], [r[0] for r in rows],
                         [r[1] for r in rows], [r[2] for r in rows], ts)
    (entries,) = _question_entries("{tc}:q", 0, qc)
    assert entries.blob == b"".join(
        hiredis.pack_command(("XADD", "{tc}:q", "*", "qid", q, "a", a, "b", b, "why", w,
                              "ts", t))
        for q, a, b, w, t in zip(qc.qid, qc.a, qc.b, qc.why, qc.ts_ms, strict=True))


def test_question_column_packs_from_arrays_read_back_as_the_questions(redis_url: str) -> None:
    """A batch's questions as the engine issues them (arrays; two groups, qids across a
    power of ten, non-ASCII keys of one length in bytes), committed as column packs of at
    most MAX_PACK_ANSWERS questions: read back from Redis, they are the questions."""
    index = KeyIndex()
    index.add([f"kiln-é{i:05d}" for i in range(5000)])
    rng = np.random.default_rng(7)
    qc = QuestionColumns.empty()
    start = 99_990
    for count, why, ts in ((10_200, "place", 1_764_000_000_000), (300, "check", 1_764_000_050)):
        qc.extend(QuestionColumns.issued(np.arange(start, start + count),
                                         rng.integers(0, 5000, 2 * count), index, why, ts))
        start += count
    assert len(qc) >= commit.QUESTION_ROWS_MIN
    assert commit._question_column_rows(qc, 0, 10) is not None  # the numpy form applies
    plan = build_commit(K, Caps(questions=0), records=None, decisions=[], questions=qc, dead=[],
                        journal=None, snapshot=None, meta={}, acks={}, group="g",
                        pack_questions=True, question_columns=True)
    r = _client(redis_url)
    assert len(_commit(r, plan.commands)) == 2  # two packs: 10,000 and 500 questions
    entries = redis.Redis.from_url(redis_url).xrange(K.questions)
    got = [q for _, f in entries for q in decode_questions(f)]
    assert [len(decode_questions(f)) for _, f in entries] == [MAX_PACK_ANSWERS, 500]
    assert got == [dict(zip(QUESTION_FIELDS, q, strict=True)) for q in qc.rows()]


@pytest.mark.parametrize("parser", PARSERS)
def test_a_timed_plan_reports_redis_time_inside_the_transaction(redis_url: str,
                                                                parser: type) -> None:
    """A timed plan starts and ends with TIME: receive() takes both replies off (the
    lease's reply stays last, where the worker checks it) and keeps Redis's own time
    between them, which covers a script that spins for milliseconds and stays within the
    round trip measured around it."""
    r = _client(redis_url, parser)
    plan = build_commit(K, Caps(10, 10, 10), records=None, decisions=[], questions=None,
                        dead=[], journal=b"j", snapshot=None, meta={"seq": 1}, acks={},
                        group="g", pack_questions=False, lease=("ECHO", "lease"),
                        timed=True)
    names = plan.names()
    assert names[0] == names[-1] == "TIME" and names[-2] == "ECHO"
    spin = "local t = 0 for i = 1, 3000000 do t = t + i end return 1"
    plan.commands.insert(1, ("EVAL", spin, 0))
    t0 = time.perf_counter()
    send(r, plan)
    result = receive(r, plan)
    wall_us = (time.perf_counter() - t0) * 1e6
    assert result[0] == 1 and result[-1] == b"lease" and len(result) == plan.replies() - 2
    assert plan.held_us is not None and 0.5 * wall_us <= plan.held_us <= wall_us
    untimed = build_commit(K, Caps(10, 10, 10), records=None, decisions=[], questions=None,
                           dead=[], journal=b"j", snapshot=None, meta={"seq": 2}, acks={},
                           group="g", pack_questions=False, lease=("ECHO", "lease"))
    assert "TIME" not in untimed.names()
    assert execute(r, untimed)[-1] == b"lease" and untimed.held_us is None


def test_many_decisions_go_in_one_script_and_read_back_as_plain_entries(
        redis_url: str) -> None:
    """A batch with DECISIONS_BY_SCRIPT decisions or more appends them with one EVAL (one
    reply of EXEC, the stream capped once); the entries hold what plain XADDs write."""
    r = _client(redis_url)
    n = commit.DECISIONS_BY_SCRIPT + 5
    keys = [f"shard-{i:05d}" for i in range(n)]
    rc = RecordColumns(keys, np.array([i % 3 - 1 for i in range(n)], dtype=np.int8),
                       np.full(n, 2, dtype=np.int8), np.linspace(-9.5, 9.5, n),
                       np.arange(n, dtype=np.int32) % 40, np.zeros(n, dtype=np.int32),
                       np.zeros(n, dtype=bool), ("north", "south"), STATUS_NAMES)
    for count, ns, name in ((n, "tmany", "EVAL"), (10, "tfew", "XADD")):
        pos = list(range(count))
        plan = build_commit(Keys(ns), Caps(10, 100_000, 10), records=rc, decisions=pos,
                            questions=None, dead=[], journal=None, snapshot=None, meta={},
                            acks={}, group="g", pack_questions=False)
        stream = Keys(ns).decisions
        assert plan.names()[:2] == ["HSET", name] and plan.names().count(name) == (
            1 if name == "EVAL" else count)
        execute(r, plan)
        rows = decision_values(rc, pos)
        want = [dict(zip(DECISION_FIELDS, map(str, rows[i:i + 6]), strict=True))
                for i in range(0, len(rows), 6)]
        assert _entries(r, stream) == want
