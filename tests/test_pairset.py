"""The pair set, the sorted insert it shares with the carry queue, and first_occurrence,
against the plain computations they replace."""

from __future__ import annotations

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st

from streamgroup.core.columns import first_occurrence, insert_sorted, uniq
from streamgroup.core.pairset import PairSet, _shift_for


@settings(max_examples=150, deadline=None)
@given(st.lists(st.lists(st.integers(0, 60), max_size=40), max_size=12), st.integers(0, 3),
       st.sampled_from([4096, 16, 1]))
def test_add_new_marks_the_first_of_each_unseen_key(batches: list[list[int]],
                                                     merge_every: int, fresh_max: int) -> None:
    """Each key is new once, at its first appearance across all batches; where its members
    are held (the fresh run joining the recent one when full, merges into the settled run
    in between) changes nothing."""
    pairs = PairSet()
    pairs.fresh_max = fresh_max
    seen: set[int] = set()
    for k, batch in enumerate(batches):
        want = []
        for key in batch:
            want.append(key not in seen)
            seen.add(key)
        got = pairs.add_new(np.array(batch, dtype=np.uint64))
        assert got.dtype == bool and got.tolist() == want
        if merge_every and k % merge_every == 0:
            pairs.merge()
        members = np.concatenate([pairs.sorted, pairs.recent, pairs.fresh])
        assert sorted(members.tolist()) == sorted(seen) and len(pairs) == len(seen)
        for run in (pairs.sorted, pairs.recent, pairs.fresh):
            assert run.tolist() == sorted(set(run.tolist()))  # sorted, no member twice
        assert len(pairs.fresh) <= fresh_max


def test_the_filter_never_hides_a_member_as_the_set_grows() -> None:
    """Past the first filter (8,192 keys) it is rebuilt larger, and keys sharing a word of
    it in one batch must all be marked: every repeat is still caught, across rebuilds,
    merges and a save and reload, checked against a Python set."""
    rng = np.random.default_rng(7)
    pairs = PairSet()
    seen: set[int] = set()
    offered: list[int] = []
    for k in range(40):
        fresh = rng.integers(0, 1 << 62, 3000, dtype=np.int64).tolist()
        again = [offered[i] for i in rng.integers(0, len(offered), 300)] if offered else []
        batch = fresh + again + fresh[:50]  # repeats of earlier batches and of this one
        want = []
        for key in batch:
            want.append(key not in seen)
            seen.add(key)
        got = pairs.add_new(np.array(batch, dtype=np.uint64))
        assert got.tolist() == want, k
        offered += fresh
        # rebuilt as the set grows: at least 8 bits a key (else nearly every key is a maybe)
        assert pairs._filter.nbytes * 8 >= 8 * len(pairs)
        if k == 25:
            pairs = PairSet.from_bytes(pairs.to_bytes())
    assert len(pairs) == len(seen) > 8 * 8192
    probe = np.array(offered[::7] + rng.integers(0, 1 << 62, 500, dtype=np.int64).tolist(),
                     dtype=np.uint64)
    assert pairs.contains(probe).tolist() == [int(x) in seen for x in probe]


def test_a_tiny_filter_with_every_word_shared_still_marks_every_key() -> None:
    """With a filter of two 64-bit words, a batch of keys puts many bits into each word at
    once (two a key)."""
    pairs = PairSet()
    pairs._filter = np.zeros(2, dtype=np.uint64)
    pairs._shift = _shift_for(128)
    keys = np.arange(1, 41, dtype=np.uint64) * np.uint64(0x1234567)
    pairs._mark(keys)
    assert pairs._maybe(keys).all()


@settings(max_examples=200, deadline=None)
@given(st.lists(st.integers(0, 10**6), max_size=50, unique=True),
       st.lists(st.integers(0, 10**6), max_size=50))
def test_insert_sorted_equals_np_insert(base: list[int], extra: list[int]) -> None:
    a = np.array(sorted(base), dtype=np.int64)
    values = np.array(sorted(extra), dtype=np.int64)
    pos = np.searchsorted(a, values)
    got = insert_sorted(a, pos, values)
    assert got.dtype == a.dtype
    assert got.tolist() == np.insert(a, pos, values).tolist()


@settings(max_examples=300, deadline=None)
@given(st.lists(st.integers(0, 40), max_size=60), st.booleans())
def test_first_occurrence_marks_what_np_unique_returns(values: list[int], ascending: bool) -> None:
    """Both paths (strictly increasing input, and any input) against np.unique's index."""
    x = np.array(sorted(set(values)) if ascending else values, dtype=np.int64)
    want = np.zeros(len(x), dtype=bool)
    want[np.unique(x, return_index=True)[1]] = True
    assert first_occurrence(x).tolist() == want.tolist()


@given(st.lists(st.integers(0, 3000), max_size=400), st.sampled_from([np.int64, np.int32]))
def test_uniq_returns_what_np_unique_returns(values: list[int], dtype: type) -> None:
    """Both paths of uniq (a bitmap for values dense in their range, a sort otherwise)
    against numpy's np.unique (the reference), as int64."""
    x = np.array(values, dtype=dtype)
    got = uniq(x)
    assert got.dtype == np.int64 and got.tolist() == np.unique(x).tolist()
    assert uniq(x * 1000).tolist() == np.unique(x * 1000).tolist()  # sparse: the sort


def test_the_filter_rules_out_nearly_every_new_key() -> None:
    """Two bits a key in one 64-bit word: at about 16 bits a key, fewer than 3% of keys
    never offered pass the filter (Bloom's false-positive formula (1 - exp(-k n / m))^k,
    common practice, from memory, gives 1.4% for k = 2 hashes without the blocking into
    words; one hash gave 5.8%)."""
    rng = np.random.default_rng(3)
    pairs = PairSet()
    keys = rng.integers(0, 1 << 62, 500_000, dtype=np.int64).astype(np.uint64)
    for lo in range(0, len(keys), 20_000):
        pairs.add_new(keys[lo:lo + 20_000])
    bits_per_key = pairs._filter.nbytes * 8 / len(pairs)
    assert 12 < bits_per_key < 20
    probe = rng.integers(0, 1 << 62, 200_000, dtype=np.int64).astype(np.uint64)
    assert pairs._maybe(probe).mean() < 0.03
    assert pairs._maybe(keys).all()  # and never rules out a member
