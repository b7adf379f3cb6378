"""The planner's hash: splitmix64, the same for one Python int and for arrays."""

from __future__ import annotations

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st

from streamgroup.core import planner
from streamgroup.core.columns import strictly_increasing
from streamgroup.core.intake import digits_to_int64


def test_mix_is_splitmix64() -> None:
    """The first two outputs of splitmix64 seeded with 0 (Vigna's reference splitmix64.c;
    values from memory, and both paths below agree with them)."""
    first, second = 0xE220A8397B1DCDAF, 0x6E789E6AA1B965F4
    golden = 0x9E3779B97F4A7C15
    assert int(planner.mix(0)) == first
    assert int(planner.mix(golden)) == second
    arr = planner.mix(np.array([0, golden], dtype=np.uint64))
    assert arr.tolist() == [first, second]


@settings(max_examples=200, deadline=None)
@given(st.lists(st.integers(0, 2**64 - 1), min_size=1, max_size=20))
def test_scalar_and_array_paths_agree(xs: list[int]) -> None:
    """A salt hashed as a Python int gives the same uint64 as the array path."""
    arr = planner.mix(np.array(xs, dtype=np.uint64))
    for x, want in zip(xs, arr.tolist(), strict=True):
        got = planner.mix(x)
        assert isinstance(got, np.uint64) and int(got) == want


@settings(max_examples=200, deadline=None)
@given(st.lists(st.integers(0, 30), max_size=80))
def test_slot_ranks_count_the_earlier_entries_of_each_target(targets: list[int]) -> None:
    """slot_ranks against the plain count, and against the np.r_ / np.repeat form it
    replaced in the planner."""
    t = np.array(targets, dtype=np.int64)
    got = planner.slot_ranks(t)
    assert got.tolist() == [targets[:k].count(x) for k, x in enumerate(targets)]
    if len(t):
        order = np.argsort(t, kind="stable")
        first = np.r_[0, np.nonzero(np.diff(t[order]))[0] + 1]
        old = np.empty(len(t), dtype=np.int64)
        old[order] = np.arange(len(t)) - np.repeat(first, np.diff(np.r_[first, len(t)]))
        assert got.tolist() == old.tolist()


@settings(max_examples=300, deadline=None)
@given(st.lists(st.text("0123456789", min_size=1, max_size=18), min_size=1, max_size=40))
def test_qid_digits_parse_like_int(texts: list[str]) -> None:
    """The intake parses checked qids (ASCII digits, fewer than 19) with numpy: the same
    numbers as int(), leading zeros included."""
    got = digits_to_int64(texts)
    assert got is not None
    assert got.dtype == np.int64 and got.tolist() == [int(t) for t in texts]


@settings(max_examples=300, deadline=None)
@given(st.lists(st.text("0123456789 \t+-x_٣²", max_size=18), min_size=1, max_size=40))
def test_qid_digits_refuse_what_is_not_plain_digits(texts: list[str]) -> None:
    """A qid that is empty, signed, spaced or in non-ASCII digits must not be parsed on the
    fast path (the answer would be matched to a question instead of refused): None
    exactly when some text is not a non-empty ASCII digit string, else int()'s numbers."""
    plain = all(t.isdigit() and t.isascii() for t in texts)
    got = digits_to_int64(texts)
    if plain:
        assert got is not None and got.tolist() == [int(t) for t in texts]
    else:
        assert got is None


@settings(max_examples=200, deadline=None)
@given(st.lists(st.integers(0, 2**63 - 1), min_size=1, max_size=40), st.integers(0, 2**32))
def test_swap_coin_is_the_uniform_below_one_half(xs: list[int], salt: int) -> None:
    """The side each question shows its items on (and the intake's guess of it) comes from
    coin: the same as uniform < 0.5, else answers would be checked against the wrong pair.
    mix in place must leave its input alone and hash int64 like uint64."""
    signed = np.array(xs, dtype=np.int64)
    before = signed.copy()
    h = planner.mix(signed.astype(np.uint64) ^ planner.mix(salt))
    plain = (h >> np.uint64(11)).astype(np.float64) / float(1 << 53)
    assert planner.uniform(signed, salt).tolist() == plain.tolist()
    want = plain < 0.5
    assert planner.coin(signed, salt).tolist() == want.tolist()
    assert signed.tolist() == before.tolist()
    assert planner.mix(signed).tolist() == [planner._mix_int(x) for x in xs]
    assert int(planner.mix(np.array(xs[0], dtype=np.uint64))) == planner._mix_int(xs[0])
    # hashes whose top 53 bits sit at the half: the float comparison and the bit agree
    edge = np.array([(1 << 63) - 1, 1 << 63, ((1 << 63) - 1) ^ 0x7FF], dtype=np.uint64)
    f = (edge >> np.uint64(11)).astype(np.float64) / float(1 << 53)
    assert (f < 0.5).tolist() == (edge < np.uint64(1 << 63)).tolist()


@settings(max_examples=200, deadline=None)
@given(st.lists(st.integers(0, 40), max_size=60), st.booleans())
def test_slot_ranks_of_sorted_and_distinct_targets(targets: list[int], distinct: bool) -> None:
    """A round's targets usually come sorted and distinct, where slot_ranks returns zeros
    without sorting: the same ranks as the plain count, with repeats or without."""
    values = sorted(set(targets)) if distinct else sorted(targets)
    t = np.array(values, dtype=np.int64)
    rising = all(x < y for x, y in zip(values[:-1], values[1:], strict=True))
    assert strictly_increasing(t) == rising
    got = planner.slot_ranks(t)
    assert got.dtype == np.int64
    assert got.tolist() == [values[:k].count(x) for k, x in enumerate(values)]


@settings(max_examples=200, deadline=None)
@given(st.lists(st.floats(-50, 50), max_size=40), st.floats(0.5, 12),
       st.one_of(st.just(0.0), st.floats(0.05, 3)))
def test_answers_still_needed_equals_the_formula(llr: list[float], boundary: float,
                                                 step: float) -> None:
    """answers_still_needed works in one buffer; it must give the plain expression's counts."""
    x = np.array(llr, dtype=np.float64)
    before = x.copy()
    got = planner.answers_still_needed(x, boundary, step)
    if step <= 0:
        want = np.ones(len(x), dtype=np.int64)
    else:
        gap = np.maximum(boundary - np.abs(x), 0.0)
        want = np.maximum(np.ceil(gap / step - 1e-9), 1).astype(np.int64)
    assert got.dtype == np.int64 and got.tolist() == want.tolist()
    assert x.tobytes() == before.tobytes()


@settings(max_examples=200, deadline=None)
@given(st.lists(st.tuples(st.integers(0, 10**6), st.integers(1, 4)), max_size=60),
       st.integers(0, 120))
def test_first_slots_equal_the_whole_repeat_cut_to_the_room(rows: list[tuple[int, int]],
                                                           room: int) -> None:
    """first_slots repeats only the candidates it needs: the same slots as repeating every
    candidate and cutting to the room, and the count of candidates used up entirely."""
    cand = np.array([c for c, _ in rows], dtype=np.int64)
    each = np.array([e for _, e in rows], dtype=np.int64)
    got, served = planner.first_slots(cand, each, room)
    assert got.tolist() == np.repeat(cand, each)[:room].tolist()
    assert served == int((np.cumsum(each) <= room).sum())
