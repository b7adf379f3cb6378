"""Entry decoding and validation: good entries decode, bad ones become readable dead letters."""

from __future__ import annotations

import unicodedata

import msgpack
import pytest
from hypothesis import example, given, settings
from hypothesis import strategies as st

from streamgroup.core.types import Answer, SourceRows
from streamgroup.keys import MAX_PACK_ANSWERS, MAX_PACK_BYTES, has_control
from streamgroup.stream import codec
from streamgroup.stream.codec import (
    decode_answers,
    decode_items,
    pack_answer_columns,
    pack_answers,
)

S = "{t}:answers"


def _e(i: int, **fields: object) -> tuple[bytes, dict[bytes, bytes]]:
    return (f"{i}-0".encode(), {k.encode(): v if isinstance(v, bytes) else str(v).encode()
                                for k, v in fields.items()})


def test_plain_answer_decodes_with_optional_fields() -> None:
    """A full answer entry yields one Answer with source, qid and its aid alongside."""
    d = decode_answers(S, [_e(1, a="shard-1", b="shard-2", same="1", source="s1", qid="7",
                              aid="p-1"), _e(2, a="shard-1", b="shard-3", same="0")])
    assert d.answers == [Answer("shard-1", "shard-2", True, "s1", "7"),
                         Answer("shard-1", "shard-3", False, "", None)]
    assert d.aids == ["p-1", None]
    assert [codec.origin(S, o) for o in d.origins] == [f"{S} 1-0", f"{S} 2-0"]
    assert not d.dead


@pytest.mark.parametrize("fields, kind, words", [
    ({"b": "x", "same": "1"}, codec.MALFORMED, "missing field a"),
    ({"a": "x", "b": "y"}, codec.MALFORMED, "missing field same"),
    ({"a": "x", "b": "x", "same": "1"}, codec.BAD_VALUE, "same item"),
    ({"a": "x", "b": "y", "same": "yes"}, codec.BAD_VALUE, "same must be 1 or 0"),
    ({"a": "", "b": "y", "same": "1"}, codec.BAD_KEY, "a must be 1 to 256 bytes"),
    ({"a": "k" * 257, "b": "y", "same": "1"}, codec.BAD_KEY, "a must be 1 to 256 bytes"),
    ({"a": "x\ny", "b": "y", "same": "1"}, codec.BAD_KEY, "control character"),
    ({"a": "x\u0085", "b": "y", "same": "1"}, codec.BAD_KEY, "control character"),
    ({"a": b"\xff\xfe", "b": "y", "same": "1"}, codec.BAD_KEY, "not valid UTF-8"),
    ({"a": "x", "b": "y", "same": "1", "source": "s" * 129}, codec.BAD_VALUE, "source"),
    ({"a": "x", "b": "y", "same": "1", "qid": ""}, codec.BAD_VALUE, "qid"),
    ({"a": "x", "b": "y", "same": "1", "aid": "a" * 129}, codec.BAD_VALUE, "aid"),
])
def test_bad_answer_entries_become_dead_letters(fields, kind, words) -> None:
    """Each malformed answer is rejected alone, with a reason naming the problem."""
    good = _e(1, a="p", b="q", same="1")
    d = decode_answers(S, [good, _e(2, **fields), _e(3, a="p", b="r", same="0")])
    assert [x.b for x in d.answers] == ["q", "r"]
    assert len(d.dead) == 1
    dead = d.dead[0]
    assert dead.kind == kind
    assert words in dead.reason
    assert dead.origin == f"{S} 2-0"
    out = dead.to_fields()
    assert out["reason"] == dead.reason and out["origin"] == f"{S} 2-0"
    assert set(fields) <= set(out)


def test_item_entries_validate_key_and_side() -> None:
    """Items need a valid key; an optional side is checked like a key; bad ones die alone."""
    d = decode_items("{t}:items", [_e(1, key="shard-1"), _e(2, key="shard-2", side="north"),
                                   _e(3, side="north"), _e(4, key="a\tb"),
                                   _e(5, key="k", side="s" * 65)])
    assert d.items == [("shard-1", None), ("shard-2", "north")]
    assert [x.kind for x in d.dead] == [codec.MALFORMED, codec.BAD_KEY, codec.BAD_VALUE]


def test_deleted_pending_entries_are_counted_not_decoded() -> None:
    """A pending entry whose content was deleted (empty fields) is counted as missing."""
    d = decode_answers(S, [(b"1-0", {}), _e(2, a="p", b="q", same="1")])
    assert d.missing == 1 and len(d.answers) == 1 and not d.dead


def test_packed_answers_round_trip_with_bool_and_int_same() -> None:
    """A pack of maps decodes to the same answers, same as 0/1 or a bool, in order."""
    answers = [Answer(f"k{i}", f"k{i + 1}", i % 2 == 0, f"s{i % 3}", str(i) if i % 2 else None)
               for i in range(50)]
    payload = pack_answers(answers, [f"aid{i}" if i % 5 == 0 else None for i in range(50)])
    d = decode_answers(S, [(b"9-1", {b"pack": payload})])
    assert d.answers == answers
    assert d.aids[0] == "aid0" and d.aids[1] is None
    assert codec.origin(S, d.origins[3]) == f"{S} 9-1#3"
    raw = msgpack.packb([{"a": "x", "b": "y", "same": True}, {"a": "x", "b": "z", "same": 0}])
    d = decode_answers(S, [(b"1-0", {b"pack": raw})])
    assert [x.same for x in d.answers] == [True, False]


def test_bad_elements_of_a_pack_die_alone() -> None:
    """In a well-formed pack, each bad element is dead-lettered with its index; the rest apply."""
    raw = msgpack.packb([
        {"a": "x", "b": "y", "same": 1},
        {"a": "x", "b": "x", "same": 1},
        "not a map",
        {"a": "x", "b": "y", "same": 2},
        {"a": "x", "b": ["nested"], "same": 1},
        {"a": "x", "b": "w", "same": 0, "source": 5},
        {"a": "x", "b": "v", "same": 0},
    ])
    d = decode_answers(S, [(b"4-0", {b"pack": raw})])
    assert [x.b for x in d.answers] == ["y", "v"]
    assert [x.origin for x in d.dead] == [f"{S} 4-0#{i}" for i in (1, 2, 3, 4, 5)]
    assert [x.kind for x in d.dead] == [codec.BAD_VALUE, codec.MALFORMED, codec.BAD_VALUE,
                                        codec.BAD_VALUE, codec.BAD_VALUE]
    assert all(isinstance(v, str) for x in d.dead for v in x.to_fields().values())


@pytest.mark.parametrize("fields, kind", [
    ({b"pack": b"\xc1"}, codec.BAD_PACK),  # 0xc1 is never used in msgpack
    ({b"pack": msgpack.packb({"a": "x"})}, codec.BAD_PACK),  # a map, not an array
    ({b"pack": msgpack.packb([])}, codec.BAD_PACK),
    ({b"pack": msgpack.packb([{"a": "x", "b": "y", "same": 1}]), b"a": b"x"}, codec.MALFORMED),
    ({b"pack": msgpack.packb([{"a": "x", "b": "y", "same": 1}] * (MAX_PACK_ANSWERS + 1))},
     codec.TOO_LARGE),
    ({b"pack": msgpack.packb(["x" * (MAX_PACK_BYTES // 1000)] * 1001)}, codec.TOO_LARGE),
    ({b"pack": msgpack.packb([{str(i): i for i in range(codec.MAX_PACK_FIELDS + 1)}])},
     codec.BAD_PACK),
])
def test_structurally_bad_packs_die_whole(fields, kind) -> None:
    """A pack beyond the size, count or shape limits is rejected whole: nothing applies."""
    d = decode_answers(S, [(b"5-0", fields), _e(6, a="p", b="q", same="1")])
    assert len(d.answers) == 1 and d.answers[0].b == "q"
    assert len(d.dead) == 1 and d.dead[0].kind == kind
    assert d.dead[0].origin == f"{S} 5-0"


def test_dead_letter_never_masks_reason_and_origin() -> None:
    """An entry that carries its own reason/origin fields keeps them under a prefixed name."""
    d = decode_answers(S, [_e(1, a="p", reason="mine", origin="elsewhere")])
    out = d.dead[0].to_fields()
    assert out["_reason"] == b"mine" and out["_origin"] == b"elsewhere"
    assert out["reason"].startswith("missing field")


@pytest.mark.parametrize("b_key", ["shard-é{}", "shard-{}"], ids=["utf8", "ascii"])
def test_batch_fast_path_equals_entry_by_entry_path(monkeypatch: pytest.MonkeyPatch,
                                                    b_key: str) -> None:
    """The whole-batch check decodes good batches exactly like the per-entry path (an ASCII
    batch is checked by numpy over its bytes, any other by the regex)."""
    entries = [_e(i, a=f"shard-{i}", b=b_key.format(i + 1), same=str(i % 2), source=f"s{i % 4}",
                  **({"qid": str(i)} if i % 3 else {}), **({"aid": f"p{i}"} if i % 5 else {}))
               for i in range(200)]
    fast = decode_answers(S, entries)
    monkeypatch.setattr(codec, "_fast_answers", lambda entries, out: False)
    slow = decode_answers(S, entries)
    assert fast.answers == slow.answers and fast.aids == slow.aids
    assert fast.origins == slow.origins and not fast.dead
    # one bad byte anywhere sends the batch down the per-entry path, which rejects it alone
    monkeypatch.undo()
    for poison in (b"shard-\x7f", b"shard-\x00x", b"shard-\x01", b"\x1fshard", b"shard-\xc2\x85",
                   b"\xe9t\xe9"):
        bad = [*entries[:5], _e(900, a=poison, b="x", same="1"), *entries[5:]]
        d = decode_answers(S, bad)
        assert len(d.answers) == 200 and [x.origin for x in d.dead] == [f"{S} 900-0"]


def test_pack_fast_path_equals_element_by_element_path(monkeypatch: pytest.MonkeyPatch) -> None:
    """Whole-pack checking decodes a good pack exactly like the per-element path."""
    rows = [{"a": f"k{i}", "b": f"kö{i}", "same": [0, 1, True, False][i % 4],
             **({"source": f"s{i % 3}"} if i % 2 else {}), **({"qid": str(i)} if i % 3 else {}),
             **({"aid": f"p{i}"} if i % 5 else {})} for i in range(300)]
    entry = [(b"7-0", {b"pack": msgpack.packb(rows)})]
    fast = decode_answers(S, entry)
    monkeypatch.setattr(codec, "_fast_pack", lambda data, eid, out: False)
    slow = decode_answers(S, entry)
    assert fast.answers == slow.answers and fast.aids == slow.aids
    assert fast.origins == slow.origins and not fast.dead and len(fast.answers) == 300


def _raw(entries: list) -> list:
    """The same entries as a raw XREADGROUP reply gives them: [id, [f, v, ...]]."""
    return [[eid, [x for kv in f.items() for x in kv] if f else None] for eid, f in entries]


def test_raw_replies_decode_like_parsed_ones() -> None:
    """The worker reads replies raw; every layout decodes as the (id, dict) form does."""
    usual = [_e(i, a=f"k{i}", b=f"k{i + 1}", same=str(i % 2), source=f"s{i % 3}", qid=str(i))
             for i in range(50)]
    other_order = [_e(60, qid="9", same="1", b="x", a="y", source="s"), _e(61, a="p", b="q",
                                                                            same="0", aid="z")]
    packed = [(b"70-0", {b"pack": pack_answers([Answer("m", "n", True, "s", "3")])})]
    bad = [_e(80, a="p", b="p", same="1"), (b"81-0", {})]
    for batch in (usual, usual + other_order, usual + packed + bad, bad + usual):
        raw, parsed = decode_answers(S, _raw(batch)), decode_answers(S, batch)
        assert raw.answers == parsed.answers and raw.aids == parsed.aids
        assert raw.origins == parsed.origins and raw.missing == parsed.missing
        assert [(d.reason, d.origin, d.fields) for d in raw.dead] == [
            (d.reason, d.origin, d.fields) for d in parsed.dead]
    items = [_e(1, key="k1"), _e(2, key="k2", side="north"), (b"3-0", {}), _e(4, side="x")]
    raw, parsed = decode_items(S, _raw(items)), decode_items(S, items)
    assert raw.items == parsed.items == [("k1", None), ("k2", "north")]
    assert raw.missing == parsed.missing == 1 and len(raw.dead) == len(parsed.dead) == 1


def test_column_packs_decode_like_row_packs() -> None:
    """A map of answer columns carries the same answers as an array of maps."""
    answers = [Answer(f"shard-{i}", f"shard-ü{i}", i % 3 == 0, f"s{i % 4}" if i % 2 else "",
                      str(i) if i % 5 else None) for i in range(300)]
    aids = [f"p{i}" if i % 7 else None for i in range(300)]
    rows = decode_answers(S, [(b"3-0", {b"pack": pack_answers(answers, aids)})])
    cols = decode_answers(S, [(b"3-0", {b"pack": pack_answer_columns(answers, aids)})])
    assert cols.answers == rows.answers == answers and cols.aids == rows.aids == aids
    assert cols.origins == rows.origins and not cols.dead


def test_bad_values_of_a_column_pack_are_dead_lettered_one_by_one() -> None:
    """A well-shaped column pack with bad values: each bad answer dead, the rest applied."""
    pack = msgpack.packb({"a": ["p", "q", "r\x07", "s"], "b": ["x", "q", "y", "z"],
                          "same": [1, 0, 1, "maybe"], "source": ["s1", None, "s2", "s3"]})
    d = decode_answers(S, [(b"4-0", {b"pack": pack})])
    assert d.answers == [Answer("p", "x", True, "s1")]
    assert [(x.origin, x.kind) for x in d.dead] == [
        (f"{S} 4-0#1", codec.BAD_VALUE), (f"{S} 4-0#2", codec.BAD_KEY),
        (f"{S} 4-0#3", codec.BAD_VALUE)]


@pytest.mark.parametrize("shape, why", [
    ({"a": ["p"], "b": ["q"]}, "missing same"),
    ({"a": ["p", "q"], "b": ["r"], "same": [1, 0]}, "same length"),
    ({"a": "p", "b": ["q"], "same": [1]}, "must be an array"),
    ({"a": [], "b": [], "same": []}, "empty column pack"),
    ({"a": ["p"], "b": ["q"], "same": [1], "qid": "7"}, "must be an array"),
])
def test_misshapen_column_packs_are_dead_lettered_whole(shape: dict, why: str) -> None:
    d = decode_answers(S, [(b"5-0", {b"pack": msgpack.packb(shape)})])
    assert not d.answers and len(d.dead) == 1 and why in d.dead[0].reason
    assert d.dead[0].kind == codec.BAD_PACK and d.dead[0].origin == f"{S} 5-0"


_EDGES = "\0\x01\x1f \x7e\x7f\x80\x9f\xa0aé"  # either side of each control range


@pytest.mark.parametrize("wrap", [str, lambda t: t.encode("utf-8", "surrogatepass")],
                         ids=["str", "bytes"])
@given(text=st.text(alphabet=st.one_of(st.sampled_from(_EDGES), st.characters(
    max_codepoint=0x2FF, exclude_categories=["Cs"])), max_size=40), nul_ok=st.booleans())
@example(text="\0", nul_ok=True)
@example(text="shard\0\x01", nul_ok=True)
@example(text="shard-\x7f", nul_ok=False)
@example(text="é\x85", nul_ok=False)
@example(text="plain ascii key", nul_ok=False)
def test_control_check_agrees_with_unicode_category_cc(wrap, text: str, nul_ok: bool) -> None:
    """``has_control`` flags exactly the characters of Unicode category Cc (the reference:
    Python's ``unicodedata``), NUL aside when allowed, for str and for UTF-8 bytes."""
    want = any(unicodedata.category(c) == "Cc" and not (nul_ok and c == "\0") for c in text)
    assert has_control(wrap(text), nul_ok=nul_ok) == want


@given(ops=st.lists(st.one_of(st.integers(0, 99).map(lambda i: ("one", i)),
                              st.integers(1, 5).map(lambda n: ("pack", n))), max_size=25))
def test_refs_read_back_like_the_list_of_tuples_they_stand_for(ops: list) -> None:
    """A pack decoded whole is kept as one run; reading it back (iteration, indexing from
    either end, bounds) gives what a list with a tuple per answer would."""
    refs, model = codec.Refs(), []
    for k, (kind, v) in enumerate(ops):
        eid = f"{k}-0".encode()
        if kind == "one":
            refs.append(eid)
            model.append(eid)
        else:
            refs.add_pack(eid, v)
            model += [(eid, i) for i in range(v)]
    assert len(refs) == len(model) and list(refs) == model and refs == model
    assert [refs[i] for i in range(-len(model), len(model))] == model + model
    for bad in (len(model), -len(model) - 1):
        with pytest.raises(IndexError):
            refs[bad]


# Good values, and values near every check of the whole-batch paths: empty, at and past
# each byte limit (in ASCII and in two-byte characters), control characters, NUL, a
# character of four bytes. A generated batch is good but for at most one poisoned value.
_GOOD = st.sampled_from(["k1", "k2", "shard-7", "é", "x" * 32, "é" * 64, "\U0001f600"])
_EDGES_TEXT = ["", "x" * 33, "x" * 128, "x" * 129, "x" * 256, "x" * 257, "é" * 65, "é" * 128,
               "é" * 129, "a\0b", "a\x7f", "a\x85", "a\nb", "\x1f", "\0"]
_BAD_OTHER = [None, 0, 1, 2, True, False, b"k", b"k\xff", "1", "0", "yes", b"1", b"2"]
_POISON = st.none() | st.tuples(st.integers(0, 5), st.integers(0, 5), st.one_of(
    st.sampled_from(_EDGES_TEXT + _BAD_OTHER),
    st.text(alphabet=st.sampled_from("ab\0\x1fé\x85 "), max_size=6)))


def _decoded(d: codec.Decoded) -> tuple:
    """All a decoding gives, the answer columns as the journal writes them (bools stay
    bools)."""
    c = d.cols if d.keyed is None else d.keyed.columns()
    return (msgpack.packb([c.a, c.b, c.same, c.source, c.qid]), d.aids, list(d.origins),
            d.missing, [(x.fields, x.reason, x.kind, x.origin) for x in d.dead])


def _slow(name: str, entries: list) -> tuple:
    """The entries decoded with the fast path ``name`` turned off (and the key-row path of
    column packs, which comes before every other)."""
    with pytest.MonkeyPatch.context() as m:
        m.setattr(codec, name, lambda *args: False)
        m.setattr(codec, "_key_row_packs", lambda *args: False)
        return _decoded(decode_answers(S, entries))


def _rows(good: list, poison: tuple | None) -> list:
    rows = [list(r) for r in good]
    if poison is not None:
        i, j, bad = poison
        rows[i % len(rows)][j % len(rows[0])] = bad
    return rows


@given(good=st.lists(st.tuples(_GOOD, _GOOD, st.sampled_from([b"1", b"0"]), _GOOD, _GOOD),
                     min_size=1, max_size=6), poison=_POISON,
       shape=st.sampled_from(["usual", "aid", "mixed", "missing"]))
def test_plain_fast_path_decodes_like_the_entry_by_entry_path(good: list, poison: tuple | None,
                                                             shape: str) -> None:
    """Raw plain entries (the usual field order read by position, or any other read by
    name) decode exactly as entry by entry, good and bad alike: the same answers, aids,
    origins and dead letters with their reasons."""
    entries = _plain_entries(_rows(good, poison), shape)
    assert _decoded(decode_answers(S, entries)) == _slow("_fast_answers", entries)


def _plain_entries(rows: list, shape: str) -> list:
    """Raw entries of these rows (a, b, same, source, qid) in the usual field order, or
    with an aid in other orders (``shape``); a value Redis could not hold becomes bytes."""
    entries = []
    for i, row in enumerate(rows):
        a, b, same, src, qid = (x.encode() if isinstance(x, str) else x for x in row)
        if not all(isinstance(x, bytes) for x in (a, b, same, src, qid)):
            a = b"k\xff"  # (a value Redis could not hold: make it bytes that are not UTF-8)
            same = same if isinstance(same, bytes) else b"2"
            src, qid = (x if isinstance(x, bytes) else b"s" for x in (src, qid))
            b = b if isinstance(b, bytes) else b"kb"
        f = [b"a", a, b"b", b, b"same", same, b"source", src, b"qid", qid]
        if shape == "aid" or (shape == "mixed" and i % 2):
            f[8:] = [b"aid", qid, b"qid", qid]
        if shape == "missing" and i == len(rows) - 1:
            f = f[2:] if i % 2 else None
        entries.append([f"{i}-0".encode(), f])
    return entries


@given(good=st.lists(st.tuples(_GOOD, _GOOD, st.sampled_from([0, 1, True, False]),
                               _GOOD | st.none(), _GOOD | st.none(), _GOOD | st.none()),
                     min_size=1, max_size=6), poison=_POISON,
       absent=st.sets(st.sampled_from(["source", "qid", "aid"])))
def test_column_pack_fast_path_decodes_like_the_element_by_element_path(
        good: list, poison: tuple | None, absent: set) -> None:
    """A column pack checked whole decodes exactly as element by element: same answers,
    aids, origins and dead letters, whatever mix of good and bad values it holds."""
    entries = _column_entries(_rows(good, poison), absent)
    assert _decoded(decode_answers(S, entries)) == _slow("_fast_columns", entries)


_KEY_FORMS = ["k%04d", "é%03d", "shard-%026d", "x%040d", "é%0120d", "%d"]


@settings(max_examples=150)
@given(n=st.integers(1, 40), form=st.sampled_from(_KEY_FORMS), qid0=st.sampled_from(
    [0, 1, 7, 95, 99_990, 10**17 - 5]), same=st.sampled_from(["bool", "int"]),
    absent=st.sets(st.sampled_from(["source", "aid"])), packs=st.integers(1, 3),
    poison=_POISON, src_form=st.sampled_from(["src-%d", "é-%d", "s%d"]))
def test_key_row_packs_decode_like_the_other_paths(n: int, form: str, qid0: int, same: str,
                                                   absent: set, packs: int,
                                                   poison: tuple | None, src_form: str) -> None:
    """Column packs of keys of one length that answer qids, read by numpy into key rows,
    decode exactly as the whole-column check and as element by element: same answers,
    aids, origins and dead letters; a pack that needs a closer look anywhere (a poisoned
    value, keys of several lengths, qids with a leading zero, ...) leaves them to those.
    Sources of one length in bytes are read as rows too, others as a list of str."""
    sources = [src_form % (i if src_form == "s%d" else i % 4) for i in range(n)]
    rows = [[form % (2 * i), form % (2 * i + 1), bool(i % 3) if same == "bool" else i % 2,
             sources[i], f"{qid0 + i}", f"aid-{i}" if i % 2 else None] for i in range(n)]
    rows = _rows(rows, poison)
    entries = [(f"{k}-0".encode(), {b"pack": msgpack.packb(
        {k: [r[j] for r in rows] for j, k in enumerate(codec.COLUMN_FIELDS)
         if k not in absent}, use_bin_type=True)}) for k in range(packs)]
    got = decode_answers(S, entries)
    assert _decoded(got) == _slow("_fast_columns", entries)
    with pytest.MonkeyPatch.context() as m:
        m.setattr(codec, "_key_row_packs", lambda *args: False)
        assert _decoded(got) == _decoded(decode_answers(S, entries))
    one_width = len({len((form % i).encode()) for i in range(2 * n)}) == 1
    if poison is None and one_width and form != "%d":
        assert got.keyed is not None and not got.dead  # the quick path was taken
        assert got.keyed.a_rows.shape == (n * packs, len((form % 0).encode()))
        source_rows = "source" not in absent and len({len(x.encode()) for x in sources}) == 1
        assert (type(got.keyed.source) is SourceRows) == source_rows


def test_key_row_packs_leave_odd_packs_to_the_general_path() -> None:
    """What the key-row path must not take: each of these decodes as the other paths do."""
    good = {"a": ["k1", "k2"], "b": ["k3", "k4"], "same": [True, False], "qid": ["10", "11"]}
    odd = [{**good, "qid": ["010", "11"]}, {**good, "qid": ["10", 11]},
           {**good, "qid": ["01", "11"]}, {**good, "qid": ["1x", "11"]},
           {**good, "b": ["k3", "k44"]}, {**good, "b": ["k1", "k4"]},
           {**good, "a": ["k\x7f", "k2"]}, {**good, "a": ["k\x00", "k2"]},
           {**good, "same": [True, 2]}, {**good, "source": ["s", ""]},
           {**good, "aid": ["p", "a\nb"]}, {**good, "a": [b"k1", b"k2"]},
           {k: v for k, v in good.items() if k != "qid"}, {**good, "qid": ["1" * 19] * 2},
           {**good, "a": ["\x85x", "k2"]}]
    for data in odd:
        entries = [(b"1-0", {b"pack": msgpack.packb(data, use_bin_type=True)})]
        got = decode_answers(S, entries)
        assert got.keyed is None, data
        assert _decoded(got) == _slow("_fast_columns", entries)
    entries = [(b"1-0", {b"pack": msgpack.packb(good, use_bin_type=True)})]
    assert decode_answers(S, entries).keyed is not None


def _column_entries(rows: list, absent: set) -> list:
    cols = {k: [r[j] for r in rows] for j, k in enumerate(codec.COLUMN_FIELDS)
            if k not in absent}
    return [(b"9-0", {b"pack": msgpack.packb(cols, use_bin_type=True)})]


def test_every_edge_value_in_every_field_decodes_like_the_slow_paths() -> None:
    """Each edge value, in each field of an otherwise good batch, decodes as the entry by
    entry (plain) and element by element (column pack) paths decode it."""
    plain = [("k1", "k2", b"1", "s1", "q1"), ("shard-7", "é", b"0", "s2", "q2")]
    packed = [("k1", "k2", 1, "s1", "q1", "p1"), ("shard-7", "é", True, None, "q2", None)]
    for bad in _EDGES_TEXT + _BAD_OTHER:
        for j in range(6):
            for shape in ("usual", "aid") if j < 5 else ():
                entries = _plain_entries(_rows(plain, (1, j, bad)), shape)
                assert _decoded(decode_answers(S, entries)) == _slow("_fast_answers", entries)
            entries = _column_entries(_rows(packed, (1, j, bad)), set())
            assert _decoded(decode_answers(S, entries)) == _slow("_fast_columns", entries)
