"""The Python client against a real redis-server: wire fields, validation, packing, reads."""

from __future__ import annotations

import msgpack
import pytest
import redis
from hypothesis import given, settings
from hypothesis import strategies as st

from streamgroup import client as client_mod
from streamgroup.client import Client, ClientInputError, answer_fields, item_fields, pack_answers
from streamgroup.core.types import Answer
from streamgroup.keys import MAX_KEY_BYTES, Keys
from streamgroup.stream.codec import decode_answers, decode_items


@pytest.fixture
def cl(redis_url: str) -> Client:
    c = Client(redis_url, ns="t")
    yield c
    c.close()


def _entries(c: Client, stream: str) -> list[dict[str, bytes]]:
    return [f for _id, f in c.redis.xrange(stream)]


def test_push_item_writes_contract_fields(cl: Client) -> None:
    """An item entry carries `key` and, when pinned, `side`, as plain strings."""
    cl.push_item("shard-000001")
    cl.push_item("shard-000002", side="north")
    assert _entries(cl, "{t}:items") == [{b"key": b"shard-000001"},
                                         {b"key": b"shard-000002", b"side": b"north"}]


def test_push_answer_writes_contract_fields(cl: Client) -> None:
    """An answer entry carries a, b, same as 1/0 and only the optional fields given."""
    cl.push_answer("shard-1", "shard-2", True, source="bench-a", qid="q7", aid="p-1")
    cl.push_answer("shard-1", "shard-3", False)
    assert _entries(cl, "{t}:answers") == [
        {b"a": b"shard-1", b"b": b"shard-2", b"same": b"1", b"source": b"bench-a",
         b"qid": b"q7", b"aid": b"p-1"},
        {b"a": b"shard-1", b"b": b"shard-3", b"same": b"0"},
    ]


@pytest.mark.parametrize("call, message", [
    (lambda c: c.push_item(""), "empty"),
    (lambda c: c.push_item("x" * (MAX_KEY_BYTES + 1)), "limit"),
    (lambda c: c.push_item("é" * 129), "limit"),  # 258 bytes of UTF-8, 129 characters
    (lambda c: c.push_item("bad\nkey"), "control"),
    (lambda c: c.push_item(42), "string"),
    (lambda c: c.push_answer("a", "a", True), "two different"),
    (lambda c: c.push_answer("a", "b", "maybe"), "same must be"),
    (lambda c: c.push_answer("a", "b", 2), "same must be"),
    (lambda c: c.push_answer("a", "b", True, source="s" * 129), "limit"),
    (lambda c: c.push_answer("a", "b", True, qid="\x00"), "control"),
    (lambda c: c.lookup("\t"), "control"),
])
def test_bad_values_are_rejected_before_sending(cl: Client, call, message: str) -> None:
    """Contract violations raise ClientInputError with a clear reason and write nothing."""
    with pytest.raises(ClientInputError, match=message):
        call(cl)
    assert cl.redis.dbsize() == 0


def test_batch_with_one_bad_element_pushes_nothing(cl: Client) -> None:
    """push_answers validates the whole batch before the first write."""
    good = [{"a": f"k{i}", "b": f"k{i + 1}", "same": 1} for i in range(50)]
    with pytest.raises(ClientInputError):
        cl.push_answers([*good, {"a": "x", "b": "x", "same": 1}])
    with pytest.raises(ClientInputError, match="unknown answer field"):
        cl.push_answers([{"a": "x", "b": "y", "same": 1, "colour": "red"}])
    assert cl.redis.dbsize() == 0


def test_push_answers_accepts_maps_answers_and_tuples(cl: Client) -> None:
    """Maps, core Answer objects and (a, b, same, ...) tuples all become the same entries."""
    n = cl.push_answers([{"a": "u", "b": "v", "same": "true"},
                         Answer("u", "w", False, source="s1", qid="q1"),
                         ("v", "w", 1, "s2")])
    assert n == 3
    got = _entries(cl, "{t}:answers")
    assert got[0] == {b"a": b"u", b"b": b"v", b"same": b"1"}
    assert got[1] == {b"a": b"u", b"b": b"w", b"same": b"0", b"source": b"s1", b"qid": b"q1"}
    assert got[2] == {b"a": b"v", b"b": b"w", b"same": b"1", b"source": b"s2"}


def test_packed_answers_round_trip(cl: Client) -> None:
    """A packed entry is one field `pack`: a msgpack array of answer maps, same as a bool."""
    answers = [(f"k{i}", f"k{i + 1}", i % 2 == 0, "src") for i in range(30)]
    assert cl.push_answers(answers, packed=True) == 30
    entries = _entries(cl, "{t}:answers")
    assert len(entries) == 1 and set(entries[0]) == {b"pack"}
    unpacked = msgpack.unpackb(entries[0][b"pack"], raw=False)
    assert unpacked[0] == {"a": "k0", "b": "k1", "same": True, "source": "src"}
    assert [m["same"] for m in unpacked] == [i % 2 == 0 for i in range(30)]


def test_column_packed_answers_round_trip(cl: Client) -> None:
    """columns=True writes one field `pack`: a msgpack map of answer columns."""
    answers = [(f"k{i}", f"k{i + 1}", i % 2 == 0, "src") for i in range(30)]
    assert cl.push_answers(answers, packed=True, columns=True) == 30
    entries = _entries(cl, "{t}:answers")
    assert len(entries) == 1 and set(entries[0]) == {b"pack"}
    cols = msgpack.unpackb(entries[0][b"pack"], raw=False)
    assert cols["a"][:2] == ["k0", "k1"] and cols["source"] == ["src"] * 30
    assert cols["same"] == [i % 2 == 0 for i in range(30)] and "qid" not in cols


def test_packing_respects_count_and_byte_limits(monkeypatch: pytest.MonkeyPatch) -> None:
    """pack_answers splits so no payload exceeds MAX_PACK_ANSWERS or MAX_PACK_BYTES."""
    fields = [{"a": f"key-{i:05d}", "b": f"key-{i + 1:05d}", "same": "1"} for i in range(1000)]
    monkeypatch.setattr(client_mod, "MAX_PACK_ANSWERS", 64)
    packs = pack_answers(fields)
    assert [len(msgpack.unpackb(p)) for p in packs] == [64] * 15 + [40]
    monkeypatch.setattr(client_mod, "MAX_PACK_ANSWERS", 10_000)
    monkeypatch.setattr(client_mod, "MAX_PACK_BYTES", 2000)
    packs = pack_answers(fields)
    assert all(len(p) <= 2000 for p in packs)
    assert sum(len(msgpack.unpackb(p)) for p in packs) == 1000


def test_column_packs_respect_count_and_byte_limits_and_decode_alike(
        monkeypatch: pytest.MonkeyPatch) -> None:
    """Column packs split like packs of maps and carry the same answers to the worker."""
    from streamgroup.client import pack_answer_columns
    from streamgroup.stream.codec import decode_answers

    fields = [{"a": f"key-{i:05d}", "b": f"key-{i + 1:05d}", "same": "1" if i % 3 else "0",
               **({"source": f"s{i % 4}"} if i % 2 else {}), **({"aid": f"p{i}"} if i % 5
                                                              else {})} for i in range(1000)]
    monkeypatch.setattr(client_mod, "MAX_PACK_ANSWERS", 64)
    packs = pack_answer_columns(fields)
    assert [len(msgpack.unpackb(p)["a"]) for p in packs] == [64] * 15 + [40]
    monkeypatch.setattr(client_mod, "MAX_PACK_ANSWERS", 10_000)
    monkeypatch.setattr(client_mod, "MAX_PACK_BYTES", 2000)
    packs = pack_answer_columns(fields)
    assert all(len(p) <= 2000 for p in packs) and len(packs) > 1
    entries = [(f"{i}-0".encode(), {b"pack": p}) for i, p in enumerate(packs, 1)]
    rows = [(b"0-1", {b"pack": p}) for p in pack_answers(fields)]
    got, want = decode_answers("S", entries), decode_answers("S", rows)
    assert got.answers == want.answers and got.aids == want.aids and not got.dead
    assert len(got.answers) == 1000


def _record(**kw) -> bytes:
    base = {"side": "1", "status": "placed", "llr": 7.5, "answers": 9, "rev": 0, "pinned": False}
    base.update(kw)
    return msgpack.packb(base)


def test_lookup_reads_the_assign_hash(cl: Client) -> None:
    """lookup decodes the msgpack record of {NS}:assign; unknown keys give None."""
    cl.redis.hset(Keys("t").assign, mapping={"shard-1": _record(),
                                            "shard-2": _record(side=None, status="asking")})
    assert cl.lookup("shard-1") == {"key": "shard-1", "side": "1", "status": "placed",
                                    "llr": 7.5, "answers": 9, "rev": 0, "pinned": False}
    assert cl.lookup("nope") is None
    many = cl.lookup_many(["shard-2", "nope", "shard-1"])
    assert [m and m["status"] for m in many] == ["asking", None, "placed"]
    assert many[0]["side"] is None


def test_assignments_iterate_every_record(cl: Client) -> None:
    """assignments() visits every item of the hash exactly once (HSCAN)."""
    cl.redis.hset(Keys("t").assign, mapping={f"k{i}": _record(answers=i) for i in range(2500)})
    seen = {r["key"]: r["answers"] for r in cl.assignments(count=300)}
    assert seen == {f"k{i}": i for i in range(2500)}
    assert cl.count_assignments() == 2500


def test_questions_iterator_unpacks_and_acks(cl: Client) -> None:
    """Plain and packed question entries both yield dicts; each entry is acked after use."""
    q = Keys("t").questions
    cl.redis.xadd(q, {"qid": "q1", "a": "x", "b": "y", "why": "seed", "ts": "1"})
    cl.redis.xadd(q, {"pack": msgpack.packb([
        {"qid": "q2", "a": "x", "b": "z", "why": "check", "ts": 2},
        {"qid": "q3", "a": "y", "b": "z", "why": "place", "ts": 3}])})
    got = list(cl.questions("crowd", "c1", block_ms=10, stop_when_idle=True))
    assert [g["qid"] for g in got] == ["q1", "q2", "q3"]
    assert got[1] == {"qid": "q2", "a": "x", "b": "z", "why": "check", "ts": 2}
    assert cl.redis.xpending(q, "crowd")["pending"] == 0


def test_unacked_questions_come_back_to_the_same_consumer(cl: Client) -> None:
    """A question taken but not finished (adapter crashed) is redelivered on the next run."""
    q = Keys("t").questions
    for i in range(3):
        cl.redis.xadd(q, {"qid": f"q{i}", "a": "x", "b": f"y{i}", "why": "place", "ts": "0"})
    it = cl.questions("crowd", "c1", block_ms=10, count=1)
    assert next(it)["qid"] == "q0"
    assert next(it)["qid"] == "q1"  # asking for the next one acknowledged q0
    it.close()  # crash while handling q1
    again = [g["qid"] for g in cl.questions("crowd", "c1", block_ms=10, stop_when_idle=True)]
    assert again == ["q1", "q2"]


def test_bad_url_and_namespace_fail_fast() -> None:
    """A malformed URL or namespace is a ClientInputError at construction."""
    with pytest.raises(ClientInputError, match="namespace"):
        Client("redis://127.0.0.1:1/0", ns="has space")
    with pytest.raises(ClientInputError, match="URL"):
        Client("http://127.0.0.1:1/0")


def test_unreachable_redis_raises_connection_error() -> None:
    """With nothing listening, the first command raises redis.ConnectionError (not a hang)."""
    from tests.redisproc import free_port

    c = Client(f"redis://127.0.0.1:{free_port()}/0", timeout=2)
    with pytest.raises(redis.ConnectionError):
        c.push_item("k")


def test_read_questions_with_zero_block_returns_at_once(cl: Client) -> None:
    """block_ms=0 means "do not wait" (not Redis's "block forever")."""
    import time

    cl.ensure_group("crowd")
    t0 = time.monotonic()
    assert cl.read_questions("crowd", "c1", block_ms=0) == []
    assert time.monotonic() - t0 < 1.0


# -- the client and the worker's codec agree -----------------------------------------------

_text = st.text(alphabet=st.characters(min_codepoint=0, max_codepoint=0x3000), max_size=70)
_keys = st.one_of(_text, st.text(alphabet="ab\u00e9\u20ac", min_size=60, max_size=140))


def _entry(fields: dict[str, str]) -> tuple[bytes, dict[bytes, bytes]]:
    return (b"1-0", {k.encode(): v.encode() for k, v in fields.items()})


@settings(max_examples=300, deadline=None)
@given(a=_keys, b=_keys, same=st.booleans(), source=st.one_of(st.none(), _text))
def test_client_accepts_exactly_what_the_worker_accepts(a, b, same, source) -> None:
    """Client validation and the worker's codec agree on every answer (plain and packed)."""
    try:
        fields = answer_fields(a, b, same, source)
    except ClientInputError:
        fields = None
    raw = {"a": a, "b": b, "same": "1" if same else "0"}
    if source is not None:
        raw["source"] = source
    try:
        entry = _entry(raw)
    except UnicodeEncodeError:  # lone surrogates: not sendable as UTF-8 at all
        assert fields is None
        return
    if source == "":
        del entry[1][b"source"]  # the client omits an empty source; so does this entry
    decoded = decode_answers("{t}:answers", [entry])
    assert (fields is not None) == bool(decoded.answers), (fields, decoded.dead)
    if fields is not None:
        (packed,) = decode_answers("{t}:answers",
                                   [(b"2-0", {b"pack": pack_answers([fields])[0]})]).answers
        assert packed == decoded.answers[0]


@settings(max_examples=200, deadline=None)
@given(key=_keys)
def test_client_item_keys_agree_with_the_worker(key: str) -> None:
    """An item key the client accepts is one the worker accepts, and the reverse."""
    try:
        item_fields(key)
        ok = True
    except ClientInputError:
        ok = False
    try:
        entry = _entry({"key": key})
    except UnicodeEncodeError:
        assert not ok
        return
    assert ok == bool(decode_items("{t}:items", [entry]).items)
