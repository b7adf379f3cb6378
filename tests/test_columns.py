"""The column forms of the hot path give exactly what the row forms give."""

from __future__ import annotations

from typing import Any
from unittest import mock

import hiredis
import msgpack
import numpy as np
import pytest
from hypothesis import example, given, settings
from hypothesis import strategies as st

from streamgroup.core.codes import STATUS_NAMES
from streamgroup.core.columns import SortedQueue
from streamgroup.core.engine import Engine
from streamgroup.core.keyindex import KeyIndex, cache_size_for
from streamgroup.core.types import (
    Answer,
    AnswerColumns,
    EngineConfig,
    KeyRowAnswers,
    Question,
    QuestionColumns,
    RecordColumns,
    SourceRows,
)
from streamgroup.keys import Keys
from streamgroup.sim.crowd import Crowd
from streamgroup.stream import commit
from streamgroup.stream.commit import (
    DECISION_FIELDS,
    Prepacked,
    assign_command,
    assign_value,
    assign_values,
    decision_entries,
    decision_values,
    xadd_entries,
    xadd_script,
)

KEY = st.text(st.characters(blacklist_categories=("Cc", "Cs")), min_size=1, max_size=40)


@settings(max_examples=60, deadline=None)
@given(st.lists(KEY, min_size=1, max_size=300, unique=True), st.data())
def test_keys_of_gathers_the_keys_that_were_added(keys: list[str], data: st.DataObject) -> None:
    index = KeyIndex()
    index.add(keys)
    picks = data.draw(st.lists(st.integers(0, len(keys) - 1), max_size=200))
    assert index.keys_of(np.array(picks, dtype=np.int64)) == [keys[i] for i in picks]
    assert index.keys_of(np.arange(len(keys))) == keys
    index.add(["one more"])  # the blob can still grow after a gather
    assert index.keys_of([len(keys)] * 9) == ["one more"] * 9
    # key_rows: the keys' bytes as rows while every key has one length in bytes
    rows = index.key_rows(np.array(picks, dtype=np.int64))
    every = [k.encode() for k in [*keys, "one more"]]
    if len({len(k) for k in every}) == 1:
        assert rows is not None and [bytes(r) for r in rows] == [every[i] for i in picks]
    else:
        assert rows is None


@settings(max_examples=60, deadline=None)
@given(st.integers(1, 12), st.lists(st.sampled_from(["a", "Z", "7", "é", "\u2603", "\U0001f600"]),
                                    min_size=1, max_size=12), st.data())
def test_keys_of_one_length_are_gathered_as_rows(width: int, alphabet: list[str],
                                                 data: st.DataObject) -> None:
    """Keys of one length in bytes (the usual deployment) are read back from whole rows of
    the blob; what keys_of gives must be the keys added, whatever the characters."""
    one = [c for c in alphabet if len(c.encode()) == len(alphabet[0].encode())]
    keys = sorted({"".join(data.draw(st.lists(st.sampled_from(one), min_size=width,
                                              max_size=width))) for _ in range(60)})
    index = KeyIndex(cache_size=4)  # a small cache: most gathers decode from the blob
    index.add(keys)
    assert index.width == len(keys[0].encode())
    picks = data.draw(st.lists(st.integers(0, len(keys) - 1), min_size=8, max_size=200))
    assert index.keys_of(np.array(picks, dtype=np.int64)) == [keys[i] for i in picks]
    assert index.keys_of(np.arange(len(keys))) == keys


@settings(max_examples=40, deadline=None)
@given(st.lists(KEY, min_size=1, max_size=300, unique=True), st.integers(1, 64), st.data())
def test_lookups_are_right_whatever_the_cache_holds(keys: list[str], cache: int,
                                                    data: st.DataObject) -> None:
    """A cache far smaller than the keys is emptied again and again; every lookup still
    finds the key's index, and an unknown key none."""
    index = KeyIndex(cache_size=cache)
    index.add(keys)
    for _ in range(5):
        picks = data.draw(st.lists(st.integers(0, len(keys) - 1), max_size=100))
        assert index.lookup([keys[i] for i in picks]).tolist() == picks
        assert len(index.cache) <= max(cache, len(keys))  # (one call may overfill it)
    assert index.lookup(["\u2603 not a key"]).tolist() == [-1]


@settings(max_examples=60, deadline=None)
@given(st.lists(KEY, min_size=1, max_size=300, unique=True), st.integers(1, 300), st.data())
def test_cached_key_strings_equal_the_stored_keys(keys: list[str], cache: int,
                                                  data: st.DataObject) -> None:
    """keys_of serves recent keys from a small direct-mapped cache of strings and lookup
    tries every key in the dict in one call: whatever the cache holds (slots shared by
    several keys, keys added in between, unknown keys among known ones), a question or a
    record must never name another item's key."""
    index = KeyIndex(cache_size=cache)
    cut = data.draw(st.integers(1, len(keys)))
    index.add(keys[:cut])
    for _ in range(6):
        if data.draw(st.booleans()) and cut < len(keys):
            more = data.draw(st.integers(cut + 1, len(keys)))
            index.add(keys[cut:more])
            cut = more
        picks = data.draw(st.lists(st.integers(0, cut - 1), max_size=120))
        assert index.keys_of(np.array(picks, dtype=np.int64)) == [keys[i] for i in picks]
        asked = [keys[i] for i in picks] + data.draw(st.lists(st.sampled_from(
            ["\u2603 not a key", keys[-1]]), max_size=2))
        want = [keys.index(k) if k in keys[:cut] else -1 for k in asked]
        assert index.lookup(asked).tolist() == want
    assert index.keys_of(np.arange(cut)) == keys[:cut]


@settings(max_examples=60, deadline=None)
@given(st.lists(KEY, min_size=2, max_size=200, unique=True), st.sampled_from([1, 2, 3, 300]),
       st.data())
def test_a_guessed_lookup_equals_the_plain_one(keys: list[str], cache: int,
                                               data: st.DataObject) -> None:
    """An answer's keys are checked against the question's pair by a string comparison
    (lookup_guessed): right, wrong, absent or uncached guesses alike, each answer must be
    counted for the items its keys name, and an unknown key found unknown."""
    index = KeyIndex(cache_size=cache)
    index.add(keys)
    index.keys_of(np.array(data.draw(st.lists(st.integers(0, len(keys) - 1), min_size=8,
                                              max_size=40)), dtype=np.int64))
    known = keys + ["\u2603 not a key"]
    for _ in range(4):
        asked = data.draw(st.lists(st.sampled_from(known), max_size=60))
        guess = np.array([keys.index(k) if k in keys and data.draw(st.booleans())
                          else data.draw(st.integers(-1, len(keys) - 1)) for k in asked],
                         dtype=np.int64)
        plain = index.lookup(asked)
        assert index.lookup_guessed(asked, guess).tolist() == plain.tolist()


def test_the_key_cache_grows_with_the_outstanding_cap() -> None:
    """Both items of every question in flight fit in the cache (within its bounds), also
    in an engine restored from a snapshot."""
    small, big = Engine(EngineConfig(max_outstanding=1_000)), Engine(EngineConfig(
        max_outstanding=200_000))
    assert small.keys.cache_size == KeyIndex.CACHE
    assert big.keys.cache_size >= 400_000
    assert Engine.restore(big.snapshot()).keys.cache_size == big.keys.cache_size
    assert cache_size_for(10**9) == 1 << 20


OPS = st.lists(st.one_of(
    st.tuples(st.sampled_from(["add", "add ordered"]), st.lists(st.integers(0, 3000),
                                                                max_size=200)),
    st.tuples(st.just("take"), st.integers(-3, 120))), max_size=40)  # k <= 0 takes none


@settings(max_examples=150, deadline=None)
@given(st.lists(st.integers(0, 3000), max_size=600), OPS, st.integers(1, 300))
@example([5, 6], [("add", [2, 1]), ("take", 2)], 300)  # the small run ahead of the big one
@example([5, 1, 9], [("take", -2)], 300)  # no room: nothing taken
def test_sorted_queue_gives_the_smallest_members_of_a_set(start: list[int], ops: list[tuple],
                                                          floor: int) -> None:
    """Against a Python set (the model): take(k) returns its k smallest members, once
    each, in order, whatever the additions (repeated, unsorted, already present) and
    however the queue splits them between its runs (a low merge floor forces merges)."""
    queue, model = SortedQueue(np.array(start, dtype=np.int64)), set(start)
    queue.MERGE_FLOOR = floor
    for op, arg in ops:
        if op.startswith("add"):
            if op == "add":
                queue.add(np.array(arg, dtype=np.int64))
            else:  # sorted and distinct, as the planner's leftovers are
                queue.add(np.unique(np.array(arg, dtype=np.int64)), ordered=True)
            model |= set(arg)
        else:
            want = sorted(model)[:max(arg, 0)]
            assert queue.take(arg).tolist() == want
            model -= set(want)
        assert queue.values().tolist() == sorted(model)
        assert bool(queue) == bool(model)


@settings(max_examples=150, deadline=None)
@given(st.lists(st.integers(0, 3000), max_size=600), OPS, st.integers(1, 300), st.data())
def test_sorted_queue_takes_back_what_it_gave(start: list[int], ops: list[tuple], floor: int,
                                              data: st.DataObject) -> None:
    """Planning gives back the unserved end of each prefix it takes (put_back, no merge),
    sometimes with values not below the rest; the queue must still hand out the smallest
    members of the set, else items would be asked about out of turn or lost."""
    queue, model = SortedQueue(np.array(start, dtype=np.int64)), set(start)
    queue.MERGE_FLOOR = floor
    for op, arg in ops:
        if op.startswith("add"):
            queue.add(np.array(arg, dtype=np.int64))
            model |= set(arg)
        else:
            got = queue.take(arg)
            want = sorted(model)[:max(arg, 0)]
            assert got.tolist() == want
            model -= set(want)
            back = sorted(data.draw(st.sets(st.sampled_from(want))) if want else set())
            if data.draw(st.booleans()):  # a foreign value: not below every member
                back = sorted(set(back) | {data.draw(st.integers(0, 3000))})
            queue.put_back(np.array(back, dtype=np.int64))
            model |= set(back)
        assert queue.values().tolist() == sorted(model)
        assert bool(queue) == bool(model)


def test_a_long_leftover_goes_back_in_front_of_the_large_run() -> None:
    """A planning round that puts back more than the small run may hold (the usual round of
    a packed batch) puts it in front of the large run; the members still come out
    smallest first, and the set is unchanged."""
    members = set(range(0, 20_000, 2)) | {5, 7, 19_999}
    queue = SortedQueue(np.arange(0, 20_000, 2, dtype=np.int64))
    queue.add(np.array([19_999, 7, 5], dtype=np.int64))  # into the small run
    got = queue.take(8_000)
    assert got.tolist() == sorted(members)[:8_000]
    queue.put_back(got[1_000:])  # 7,000 back: more than MERGE_FLOOR
    want = sorted(members)[1_000:]
    assert len(queue.big) > 7_000 and queue.small.tolist() == [19_999]
    assert queue.take(50).tolist() == want[:50]
    assert queue.values().tolist() == want[50:]


@settings(max_examples=60, deadline=None)
@given(st.integers(1, 200), st.integers(0, 2**32 - 1))
def test_assign_values_decode_like_the_one_record_form(n: int, seed: int) -> None:
    rng = np.random.default_rng(seed)
    rc = RecordColumns(
        [f"shard-{i}" for i in range(n)], rng.integers(-1, 2, n).astype(np.int8),
        rng.integers(0, len(STATUS_NAMES), n).astype(np.int8),
        rng.normal(0, 50, n).round(6), rng.integers(0, 2**31 - 1, n).astype(np.int32),
        rng.integers(0, 70_000, n).astype(np.int32), rng.random(n) < 0.3,
        ("north", "söuth"), STATUS_NAMES)
    rows = rc.rows()
    packed = assign_values(rc)
    assert [msgpack.unpackb(v) for v in packed] == [msgpack.unpackb(assign_value(r))
                                                    for r in rows]
    assert all(type(msgpack.unpackb(v)["llr"]) is float for v in packed)
    # counts below 128 (the usual case) take the shortest form: byte for byte what the
    # reference packer, msgpack-python's packb, writes for the same map
    rc.answers, rc.rev = rc.answers % 128, rc.rev % 128
    assert assign_values(rc) == [assign_value(r) for r in rc.rows()]
    # the batch's HSET, formatted whole: what hiredis packs for the keys and values
    for keys in (rc.keys, [k + "é" * (i % 3) + "k" * (i % 300) for i, k in enumerate(rc.keys)]):
        rc.keys = keys
        flat = [x for r in rc.rows() for x in (r.key, assign_value(r))]
        assert assign_command("{t}:assign", rc) == hiredis.pack_command(
            ("HSET", "{t}:assign", *flat))
    # the decisions stream's fields, from the columns, as from the records one by one
    # (with no evidence yet, as most items first asked about, and a negative zero)
    rc.llr[rng.random(n) < 0.5] = 0.0
    rc.llr[rng.random(n) < 0.1] = -0.0
    pos = sorted(rng.choice(n, size=int(rng.integers(0, n + 1)), replace=False).tolist())
    want: list[object] = []
    for r in rc.rows(pos):
        want += (r.key, "" if r.side is None else r.side, r.status, repr(float(r.llr)),
                 int(r.answers), int(r.rev))
    got = decision_values(rc, pos)
    assert got == want and [type(v) for v in got] == [type(v) for v in want]
    # and formatted as XADDs straight from the columns: what the generic formatter writes,
    # for counts within the table and beyond it
    for key, extra in (("{t}:decisions", 0), ("{t}:dé", 4000)):
        rc.answers = rc.answers + extra
        assert decision_entries(key, 50, rc, pos) == xadd_entries(
            key, 50, DECISION_FIELDS, decision_values(rc, pos))
        # and from DECISIONS_BY_SCRIPT rows on, one EVAL of the append script: what
        # hiredis packs for the script, the key, the cap and the values
        with mock.patch.object(commit, "DECISIONS_BY_SCRIPT", 1):
            got_eval = decision_entries(key, 50, rc, pos)
        if pos:
            assert got_eval == [Prepacked("EVAL", hiredis.pack_command(
                ("EVAL", xadd_script(DECISION_FIELDS), 1, key, 50,
                 *decision_values(rc, pos))), 1)]


@settings(max_examples=60, deadline=None)
@given(st.integers(1, 1200), st.integers(0, 2**32 - 1),
       st.sampled_from(["shard-%05d", "é-%04d", "%d"]))
def test_assign_command_from_key_rows_sets_what_the_reference_sets(
        n: int, seed: int, form: str) -> None:
    """The numpy form of the batch's HSET (keys of one length in bytes, records grouped by
    kind of prefix) against hiredis packing the records one by one: the same command with
    the same field-value pairs; byte for byte when every record has one kind.
    (``assign_command`` takes the numpy form from ``ROWS_MIN`` records on.)"""
    rng = np.random.default_rng(seed)
    index = KeyIndex()
    index.add([form % i for i in range(2 * n)])
    idx = np.sort(rng.choice(2 * n, size=n, replace=False))
    one_kind = rng.random() < 0.3
    rc = RecordColumns(
        index.keys_of(idx),
        np.full(n, 1, dtype=np.int8) if one_kind else rng.integers(-1, 2, n).astype(np.int8),
        np.full(n, 2, dtype=np.int8) if one_kind
        else rng.integers(0, len(STATUS_NAMES), n).astype(np.int8),
        rng.normal(0, 50, n).round(6), rng.integers(0, 128, n).astype(np.int32),
        rng.integers(0, 128 if seed % 2 else 70_000, n).astype(np.int32),
        rng.random(n) < 0.3, ("north", "söuth"), STATUS_NAMES, index, idx)
    rows = rc.key_rows()
    assert (rows is not None) == (form != "%d" or 2 * n <= 10)
    flat = [x for r in rc.rows() for x in (r.key.encode(), assign_value(r))]
    want = hiredis.pack_command(("HSET", "{t}:assign", *flat))
    got = (assign_command("{t}:assign", rc) if rows is None
           else commit._assign_rows("{t}:assign", rc, rows))
    if n >= commit.ROWS_MIN:
        assert assign_command("{t}:assign", rc) == got
    if (one_kind or rows is None) and rc.rev.max() < 128:
        assert got == want  # (counts of 128 on take a longer form than packb's: see above)
    reader = hiredis.Reader()
    reader.feed(got)
    cmd = reader.gets()
    assert reader.gets() is False  # one command, nothing left over
    assert cmd[:2] == [b"HSET", b"{t}:assign"] and len(cmd) == 2 + 2 * n
    pairs = {k: msgpack.unpackb(v) for k, v in zip(cmd[2::2], cmd[3::2], strict=True)}
    assert pairs == {k: msgpack.unpackb(v) for k, v in zip(flat[0::2], flat[1::2],
                                                            strict=True)}


def _key_rows_of(answers: list[Answer], source_rows: bool = False) -> KeyRowAnswers:
    """The answers as key rows; with ``source_rows``, their sources as rows too when all
    have one length in bytes (as the codec reads them)."""
    def rows(keys: list[str]) -> np.ndarray:
        return np.frombuffer("".join(keys).encode(), dtype=np.uint8).reshape(len(keys), -1)
    sources: Any = [x.source for x in answers]
    if source_rows and len({len(x.encode()) for x in sources}) == 1:
        sources = SourceRows(rows(sources))
    return KeyRowAnswers(rows([x.a for x in answers]), rows([x.b for x in answers]),
                         np.array([x.same for x in answers], dtype=bool), sources,
                         np.array([int(x.qid) for x in answers], dtype=np.int64))


@pytest.mark.parametrize("source_rows", [False, True])
def test_engine_takes_key_row_answers_as_it_takes_their_text(source_rows: bool) -> None:
    """Two engines fed the same answers, one as text columns and one as key rows (the
    quick check where each answer holds its question's keys as shown; the text checks
    where one is swapped, names another pair or a qid never issued, repeats a qid, or comes
    from a new source), end identical, refuse the same batches with the same reason, and
    the quick check is what most batches take. With ``source_rows`` the sources come as
    byte rows as well, looked up without a str each (a new source of the same length
    among them sends its batch to the text checks)."""
    crowd = Crowd(1000, seed=9, sources=[0.8, 0.7, 0.9])
    cfg = EngineConfig(seed=9, question_timeout_ms=3000)  # refused batches are asked again
    text_e, rows_e = Engine(cfg), Engine(cfg)
    for e in (text_e, rows_e):
        e.add_items([(k, None) for k in crowd.keys])
    quick = {"taken": 0}
    check = rows_e._check_key_rows

    def counted(k: KeyRowAnswers) -> Any:
        got = check(k)
        quick["taken"] += got is not None
        return got
    rows_e._check_key_rows = counted  # type: ignore[method-assign]
    rng = np.random.default_rng(9)
    now, refused, rounds, asked = 0, 0, 0, []
    for rnd in range(300):
        now += 1000
        qc = text_e.plan_columns(now)
        assert rows_e.plan_columns(now).rows() == qc.rows()
        asked += qc.rows()
        answers = crowd.answer_now(asked[:40])  # a few at a time: many batches
        del asked[:40]
        if not answers:
            continue
        rounds += 1
        kind = rnd % 10  # 1 to 5 change something; the rest is as asked
        k = int(rng.integers(len(answers)))
        x = answers[k]
        if kind == 1:  # shown the other way round
            answers[k] = x._replace(a=x.b, b=x.a)
        elif kind == 2 and len(answers) > 1:  # a qid answered twice in the batch
            answers.append(answers[0]._replace(source=crowd.source_names[1]))
        elif kind == 3:  # a source heard of for the first time
            answers[k] = x._replace(source=f"new-{rnd}")
        elif kind == 4:  # a qid never issued: the batch is refused
            answers[k] = x._replace(qid=str(10**9 + rnd))
        elif kind == 5 and len(answers) > 1 and answers[0].qid != x.qid:  # another pair
            answers[k] = x._replace(a=answers[0].a, b=answers[0].b)
        want = got = None
        try:
            want = text_e.add_answer_columns(AnswerColumns.of(answers), now).tolist()
        except Exception as exc:  # noqa: BLE001 - compared with the other engine's
            want = repr(exc)
        try:
            got = rows_e.add_answer_columns(_key_rows_of(answers, source_rows), now).tolist()
        except Exception as exc:  # noqa: BLE001
            got = repr(exc)
        assert got == want
        refused += isinstance(want, str)
        cols_t, moved_t = text_e.take_update_columns()
        cols_r, moved_r = rows_e.take_update_columns()
        assert cols_t.rows() == cols_r.rows() and moved_t == moved_r
        if text_e.done():
            break
    assert text_e.snapshot() == rows_e.snapshot()
    assert refused >= 20 and quick["taken"] >= rounds // 3


def test_engine_column_calls_equal_row_calls() -> None:
    """Two engines fed the same answers, one as rows and one as columns, end identical."""
    crowd = Crowd(300, seed=4)
    rows_e, cols_e = Engine(EngineConfig(seed=4)), Engine(EngineConfig(seed=4))
    for e in (rows_e, cols_e):
        e.add_items([(k, None) for k in crowd.keys])
    now = 0
    for _ in range(200):
        now += 1000
        qs = rows_e.plan(now)
        qc = cols_e.plan_columns(now)
        assert qc.rows() == qs
        answers = crowd.answer_now(qs)
        got = rows_e.add_answers(answers, now)
        fresh = cols_e.add_answer_columns(AnswerColumns.of(answers), now)
        assert got == ["applied" if f else "duplicate" for f in fresh.tolist()]
        updates = rows_e.take_updates()
        cols, moved = cols_e.take_update_columns()
        assert updates == (cols.rows(), cols.rows(moved))
        if rows_e.done():
            break
    assert rows_e.snapshot() == cols_e.snapshot()
    assert AnswerColumns.of(answers).rows() == answers
    assert AnswerColumns.of([]).rows() == [] and Answer("a", "b", True) in AnswerColumns.of(
        [Answer("a", "b", True)]).rows()


# -- question column packs, written from the engine's arrays ------------------------------

def _keys_of_width(width: int, count: int, wide: bool, seed: int) -> list[str]:
    """Up to ``count`` different keys of ``width`` bytes of UTF-8 each; with ``wide``, some
    of their characters take two bytes (é) or three (€)."""
    rng = np.random.default_rng(seed)
    chars = ["a", "b", "c", "z", "0", "-"] + (["é", "€"] if wide else [])
    out: set[str] = set()
    for _ in range(4 * count):
        key, left = "", width
        while left:
            c = chars[int(rng.integers(len(chars)))]
            if len(c.encode()) <= left:
                key, left = key + c, left - len(c.encode())
        out.add(key)
        if len(out) == count:
            break
    return sorted(out)


def _question_groups(keys: list[str], index: KeyIndex, start: int,
                     groups: list[tuple[int, str, int]], seed: int
                     ) -> tuple[QuestionColumns, dict[str, list]]:
    """Columns made of one engine-like group per (count, why, ts), with consecutive qids
    from ``start`` and items at random; and the same questions as plain lists, built
    without QuestionColumns (the reference)."""
    rng = np.random.default_rng(seed)
    qc = QuestionColumns.empty()
    ref: dict[str, list] = {"qid": [], "a": [], "b": [], "why": [], "ts": []}
    for count, why, ts in groups:
        shown = rng.integers(0, len(keys), 2 * count)
        qid = np.arange(start, start + count, dtype=np.int64)
        start += count
        qc.extend(QuestionColumns.issued(qid, index.add(keys)[shown], index, why, ts))
        ref["qid"] += [str(q) for q in range(start - count, start)]
        ref["a"] += [keys[k] for k in shown[:count].tolist()]
        ref["b"] += [keys[k] for k in shown[count:].tolist()]
        ref["why"] += [why] * count
        ref["ts"] += [ts] * count
    return qc, ref


def _packed_slice(ref: dict[str, list], i: int, j: int) -> bytes:
    return msgpack.packb({k: v[i:j] for k, v in ref.items()}, use_bin_type=True)


QID_STARTS = [0, 1, 5, 9, 90, 99, 9_990, 9_999, 99_999, 999_990, 2**31 - 7, 2**32 - 9,
              10**12 - 3, 10**18 - 20]  # around powers of ten (digit counts) and dtypes
TIMES = [0, 1, 127, 128, 255, 256, 65_535, 65_536, 2**32 - 1, 2**32, 1_764_000_000_000]


@settings(max_examples=50, deadline=None)
@given(first=st.integers(1, 25_000),
       more=st.lists(st.tuples(st.integers(1, 300), st.sampled_from(["seed", "place", "check"]),
                               st.sampled_from(TIMES)), max_size=4),
       why=st.sampled_from(["seed", "place", "check", "plaçe"]), ts=st.sampled_from(TIMES),
       start=st.sampled_from(QID_STARTS) | st.integers(0, 10**15),
       width=st.sampled_from([1, 5, 12, 31, 32, 33, 200, 255, 256]), wide=st.booleans(),
       seed=st.integers(0, 2**32 - 1), data=st.data())
@example(first=15, more=[], why="place", ts=1_764_000_000_000, start=0, width=12, wide=False,
         seed=0, data=None)
@example(first=16, more=[(1, "check", 5)], why="seed", ts=0, start=9, width=31, wide=True,
         seed=1, data=None)
@example(first=10_000, more=[(300, "check", 2**32)], why="place", ts=65_536, start=99_999,
         width=32, wide=True, seed=2, data=None)
def test_question_column_pack_is_what_msgpack_packs(
        first: int, more: list, why: str, ts: int, start: int, width: int, wide: bool,
        seed: int, data: st.DataObject | None) -> None:
    """The column pack written from the engine's arrays is, byte for byte, msgpack-python's
    packb of the columns as lists, for any count, qids across powers of ten, keys of any
    one length in bytes (ASCII or not), several groups of different why and time, and any
    slice of them."""
    keys = _keys_of_width(width, 50, wide and width > 1, seed)
    index = KeyIndex()
    qc, ref = _question_groups(keys, index, start, [(first, why, ts), *more], seed)
    n = len(qc)
    assert n == len(ref["qid"])
    cuts = [(0, n), (0, min(n, commit.MAX_PACK_ANSWERS))]
    if data is not None:
        i = data.draw(st.integers(0, n - 1))
        cuts.append((i, data.draw(st.integers(i + 1, n))))
    for i, j in cuts:
        want = _packed_slice(ref, i, j)
        assert commit._question_column_rows(qc, i, j) == want  # the numpy form, not None
        assert commit.question_column_pack(qc, i, j) == want
    # the lists, made when read, are the reference's
    assert (qc.qid, qc.a, qc.b, qc.why, qc.ts_ms) == tuple(ref.values())
    assert qc.rows() == list(map(Question, *ref.values()))


@pytest.mark.parametrize("n", [1, 15, 16, 31, 32, 65_535, 65_536])
def test_question_column_pack_array_headers(n: int) -> None:
    """Array lengths at msgpack's header boundaries (fixarray, array16, array32)."""
    keys = _keys_of_width(9, 300, True, n)
    qc, ref = _question_groups(keys, KeyIndex(), 99_990, [(n, "place", 1_764_000_000_000)], n)
    assert commit._question_column_rows(qc, 0, n) == _packed_slice(ref, 0, n)


def test_question_column_pack_falls_back_to_msgpack() -> None:
    """Keys of different lengths in bytes, columns given as lists, or qids the fast form does
    not write: no numpy form (None), and the pack is msgpack's packb of the lists."""
    keys = ["shard-1", "shard-22", "shärd-3", "s4"]
    index = KeyIndex()
    qc, ref = _question_groups(keys, index, 7, [(40, "place", 5), (3, "check", 6)], 0)
    assert index.key_rows(np.arange(4)) is None
    assert commit._question_column_rows(qc, 0, 43) is None
    assert commit.question_column_pack(qc, 0, 43) == _packed_slice(ref, 0, 43)
    # a part given as lists, next to a group
    keys = _keys_of_width(8, 20, False, 0)
    index = KeyIndex()
    qc, ref = _question_groups(keys, index, 0, [(30, "seed", 5)], 1)
    assert commit._question_column_rows(qc, 0, 30) is not None
    qc.extend(QuestionColumns(["30"], [keys[0]], [keys[1]], ["place"], [6]))
    for k, v in zip(ref, ("30", keys[0], keys[1], "place", 6), strict=True):
        ref[k].append(v)
    assert commit._question_column_rows(qc, 0, 31) is None
    assert commit.question_column_pack(qc, 0, 31) == _packed_slice(ref, 0, 31)
    assert commit.question_column_pack(qc, 0, 30) == _packed_slice(ref, 0, 30)
    # negative numbers (never a qid of the engine's): their text has a sign
    odd = QuestionColumns.issued(np.array([-1, 2]), np.array([0, 1, 2, 3]), index, "place", 1)
    assert commit._question_column_rows(odd, 0, 2) is None
    assert commit.question_column_pack(odd, 0, 2) == msgpack.packb(
        {"qid": ["-1", "2"], "a": keys[0:2], "b": keys[2:4], "why": ["place"] * 2,
         "ts": [1, 1]}, use_bin_type=True)


def test_question_columns_of_groups_behave_as_lists() -> None:
    """len, extend, equality and rows of columns made of groups and of lists alike; a group
    makes its lists only when read."""
    keys = _keys_of_width(6, 30, True, 3)
    index = KeyIndex()
    qc, ref = _question_groups(keys, index, 98, [(3, "seed", 5), (4, "place", 5)], 2)
    assert len(qc) == 7 and qc._cols == [None] * 5  # nothing made yet
    as_lists = QuestionColumns(*(list(v) for v in ref.values()))
    assert qc == as_lists and qc.rows() == as_lists.rows()
    qc.extend(QuestionColumns.empty())
    qc.extend(as_lists)
    assert len(qc) == 14 and qc.qid == ref["qid"] * 2 and qc.ts_ms == ref["ts"] * 2
    assert QuestionColumns.issued(np.arange(0), np.arange(0), index, "seed", 1).parts == []
    assert len(QuestionColumns.empty()) == 0 and QuestionColumns.empty().qid == []


def test_engine_questions_pack_as_their_lists() -> None:
    """The engine's questions (bootstrap block, then placement: several groups in a batch)
    pack from their arrays exactly as msgpack packs their lists, and build_commit writes the
    same entries either way."""
    crowd = Crowd(3000, seed=5)
    eng = Engine(EngineConfig(seed=5, max_outstanding=4000))
    eng.add_items([(k, None) for k in crowd.keys])
    keys = Keys("tq")
    now, fast = 0, 0
    for _ in range(30):
        now += 1000
        qc = eng.plan_columns(now)
        if len(qc):
            assert all(isinstance(p, QuestionColumns.Group) for p in qc.parts)
            fast += len(qc) >= commit.QUESTION_ROWS_MIN
            lists = QuestionColumns(*(list(c) for c in (qc.qid, qc.a, qc.b, qc.why, qc.ts_ms)))
            for i in range(0, len(qc), 1500):
                want = msgpack.packb(commit._question_column_map(lists, i, i + 1500),
                                     use_bin_type=True)
                assert commit.question_column_pack(qc, i, i + 1500) == want
            for cols in (True, False):
                plans = [commit.build_commit(
                    keys, commit.Caps(), records=None, decisions=[], questions=q, dead=[],
                    journal=None, snapshot=None, meta={}, acks={}, group="g",
                    pack_questions=True, question_columns=cols) for q in (qc, lists)]
                assert plans[0].packed() == plans[1].packed()
        eng.add_answers(crowd.answer_now(qc.rows()), now)
    assert fast >= 2
