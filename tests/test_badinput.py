"""Hostile input: a corpus of malformed entries against a live worker, and a decoder fuzz."""

from __future__ import annotations

import math
import shutil
from typing import Any

import msgpack
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from streamgroup.core.types import Answer
from streamgroup.keys import MAX_ID_BYTES, MAX_KEY_BYTES, MAX_SOURCE_BYTES
from streamgroup.stream import codec
from streamgroup.stream.codec import decode_answers, decode_items, pack_answers
from tests import badcorpus

S = "{f}:answers"
CTRL = {chr(c) for c in range(32)} | {chr(c) for c in range(0x7F, 0xA0)}


@pytest.mark.redis
@pytest.mark.skipif(shutil.which("redis-server") is None, reason="redis-server not installed")
def test_corpus_dead_letters_each_bad_entry_and_applies_the_good_ones() -> None:
    """>= 20 kinds of bad entries: each in {NS}:dead with its reason, all good applied."""
    res = badcorpus.bad_input()
    assert res.passed, {k: v for k, v in res.details.items() if k != "rows"}
    assert res.details["cases"] >= 20
    for row in res.details["rows"]:  # a person can read why: no empty "()" placeholders
        assert "()" not in row["reason"] and len(row["reason"]) > 10, row


def test_corpus_cases_are_distinct_kinds() -> None:
    """The corpus names each kind once, so the README table has one row per kind."""
    kinds = [c.kind for c in badcorpus.CASES]
    assert len(kinds) == len(set(kinds)) >= 20


# -- fuzz of the entry decoder -------------------------------------------------------------

raw = st.binary(max_size=300)
field_names = st.sampled_from([b"a", b"b", b"same", b"source", b"qid", b"aid", b"pack",
                               b"key", b"side", b"x"]) | st.binary(max_size=8)
plain_entry = st.dictionaries(field_names, raw | st.sampled_from([b"0", b"1", b""]),
                              min_size=1, max_size=7)
scalars = (st.none() | st.booleans() | st.integers(-2 ** 63, 2 ** 64 - 1)
           | st.floats(allow_nan=True) | st.text(max_size=40) | st.binary(max_size=40))
values = st.recursive(scalars, lambda kids: st.lists(kids, max_size=3)
                      | st.dictionaries(st.text(max_size=6), kids, max_size=3), max_leaves=8)
element = st.dictionaries(st.sampled_from(["a", "b", "same", "source", "qid", "aid", "z"]),
                          values, max_size=7) | values
pack_entry = st.lists(element, max_size=12).map(
    lambda els: {b"pack": msgpack.packb(els, use_bin_type=True)})
junk_pack = raw.map(lambda b: {b"pack": b})


def _valid_text(s: str, limit: int) -> bool:
    return 0 < len(s.encode()) <= limit and not (set(s) & CTRL)


def _check(entries: list[tuple[bytes, dict[bytes, bytes]]]) -> None:
    d = decode_answers(S, entries)
    # every output is within the contract
    for ans, aid in zip(d.answers, d.aids, strict=True):
        assert isinstance(ans, Answer) and ans.a != ans.b and isinstance(ans.same, bool)
        assert _valid_text(ans.a, MAX_KEY_BYTES) and _valid_text(ans.b, MAX_KEY_BYTES)
        assert ans.source == "" or _valid_text(ans.source, MAX_SOURCE_BYTES)
        assert ans.qid is None or _valid_text(ans.qid, MAX_ID_BYTES)
        assert aid is None or _valid_text(aid, MAX_ID_BYTES)
    for dead in d.dead:
        out = dead.to_fields()
        assert dead.reason and out["reason"] == dead.reason and out["origin"] == dead.origin
        assert dead.kind in {codec.MALFORMED, codec.BAD_KEY, codec.BAD_VALUE, codec.BAD_PACK,
                             codec.TOO_LARGE}
    # nothing vanishes: each plain entry is one answer or one dead letter; a pack is one
    # dead letter, or one answer or dead letter per element
    by_entry: dict[bytes, int] = {}
    for o in d.origins:
        eid = o[0] if isinstance(o, tuple) else o
        by_entry[eid] = by_entry.get(eid, 0) + 1
    for dead in d.dead:
        eid = dead.origin.split(" ", 1)[1].split("#")[0].encode()
        by_entry[eid] = by_entry.get(eid, 0) + 1
    for eid, fields in entries:
        got = by_entry.get(eid, 0)
        if b"pack" in fields and len(fields) == 1:
            try:
                n = len(msgpack.unpackb(fields[b"pack"], raw=False, strict_map_key=False))
            except Exception:  # noqa: BLE001 - any unpack failure: a whole-pack dead letter
                n = 1
            assert got in (1, n), (fields, got)
        else:
            assert got == 1, (fields, got)


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.lists(plain_entry | pack_entry | junk_pack, min_size=1, max_size=8))
def test_decoder_never_raises_and_accounts_for_every_entry(entries: list[dict]) -> None:
    """Any bytes in any fields: no exception, valid outputs only, no entry silently lost."""
    _check([(f"{i + 1}-0".encode(), f) for i, f in enumerate(entries)])


@settings(max_examples=200, deadline=None)
@given(st.lists(st.tuples(st.text(min_size=1, max_size=20), st.text(min_size=1, max_size=20),
                          st.booleans(), st.text(max_size=10)), min_size=1, max_size=30))
def test_valid_answers_round_trip_plain_and_packed(rows: list[tuple[str, str, bool, str]]
                                                    ) -> None:
    """Answers within the contract decode to themselves, one per entry and inside a pack."""
    good = [Answer(a, b, same, src) for a, b, same, src in rows
            if a != b and _valid_text(a, MAX_KEY_BYTES) and _valid_text(b, MAX_KEY_BYTES)
            and (src == "" or _valid_text(src, MAX_SOURCE_BYTES))]
    if not good:
        return
    packed = decode_answers(S, [(b"1-0", {b"pack": pack_answers(good)})])
    assert packed.answers == good and not packed.dead
    plain = decode_answers(S, [(f"{i + 1}-0".encode(), {k.encode(): v.encode() for k, v in
                                codec.answer_fields(a).items()}) for i, a in enumerate(good)])
    assert plain.answers == good and not plain.dead


@settings(max_examples=200, deadline=None)
@given(st.lists(st.dictionaries(field_names, raw, min_size=1, max_size=4), min_size=1,
                max_size=8))
def test_item_decoder_never_raises(entries: list[dict[bytes, bytes]]) -> None:
    """Item entries of any bytes: each is one item or one dead letter, never an exception."""
    d = decode_items("{f}:items", [(f"{i + 1}-0".encode(), f) for i, f in enumerate(entries)])
    assert len(d.items) + len(d.dead) == len(entries)
    for key, side in d.items:
        assert _valid_text(key, MAX_KEY_BYTES) and (side is None or _valid_text(side, 64))


def test_nan_and_huge_numbers_in_a_pack_are_rejected_alone() -> None:
    """NaN, infinities and 2**64-1 as ``same`` are bad values; the good element survives."""
    els: list[dict[str, Any]] = [{"a": "p", "b": "q", "same": v}
                                 for v in (math.nan, math.inf, 2 ** 64 - 1, -1, 1.0)]
    els.append({"a": "p", "b": "r", "same": 1})
    d = decode_answers(S, [(b"1-0", {b"pack": msgpack.packb(els)})])
    assert [a.b for a in d.answers] == ["r"]
    assert [x.origin for x in d.dead] == [f"{S} 1-0#{i}" for i in range(5)]
