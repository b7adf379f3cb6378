"""Growable, named numpy columns of equal length (struct-of-arrays state)."""

from __future__ import annotations

from typing import Any

import numpy as np

# The operand of ``np.add.at`` / ``np.subtract.at`` on the int32 counters: a Python int
# there takes numpy's slow casting path (about 70 us per 1,000 indices against 5 us).
ONE_I32 = np.int32(1)


class Columns:
    """Named numpy arrays that grow together, by a quarter at a time."""

    def __init__(self, fields: dict[str, tuple[Any, Any]], capacity: int = 16) -> None:
        self.fields = fields
        self.n = 0
        self.data = {k: np.full(capacity, fill, dtype=dt) for k, (dt, fill) in fields.items()}

    def __getitem__(self, name: str) -> np.ndarray:
        """The full-capacity array: index it with valid positions only."""
        return self.data[name]

    def view(self, name: str) -> np.ndarray:
        return self.data[name][: self.n]

    def grow(self, count: int) -> np.ndarray:
        start, need = self.n, self.n + count
        cap = len(next(iter(self.data.values())))
        if need > cap:
            new_cap = max(need, cap + cap // 4)  # 25% headroom: memory over copy cost
            for k, (dt, fill) in self.fields.items():
                arr = np.empty(new_cap, dtype=dt)  # each byte written once, not twice
                arr[:start] = self.data[k][:start]
                arr[start:] = fill
                self.data[k] = arr
        self.n = need
        return np.arange(start, need)

    def to_state(self) -> dict[str, Any]:
        return {"n": self.n, "cols": {k: self.view(k).tobytes() for k in self.fields}}

    def load_state(self, st: dict[str, Any]) -> None:
        n = int(st["n"])
        self.n = 0
        self.grow(n)
        for k, (dt, _) in self.fields.items():
            self.data[k][:n] = np.frombuffer(st["cols"][k], dtype=dt)

    def nbytes(self) -> int:
        return sum(a.nbytes for a in self.data.values())


# On the hot path numpy is called through array methods (a.searchsorted, a.argsort,
# a.take, a.nonzero, a.compress ...) and np.count_nonzero rather than the np.* functions
# and a.any() / a.all(), whose Python wrappers cost more than the work on a batch of 50
# (e.g. 0.3 against 0.9 us for a searchsorted, 0.1 against 0.7 us for an any): the same C
# code, the same results.


def strictly_increasing(x: np.ndarray) -> bool:
    """Whether each value of the integer array ``x`` is above the one before it."""
    return len(x) < 2 or not np.count_nonzero(x[1:] <= x[:-1])


def uniq(x: np.ndarray) -> np.ndarray:
    """Sorted distinct values of non-negative integers (a plain sort: faster than
    np.unique's hashing for ints; values dense in their range, as a batch's items among
    all items often are, marked in a bitmap instead: 0.4 against 1.7 ms for 40,000 values
    below 300,000)."""
    if len(x) < 2:
        return np.asarray(x, dtype=np.int64)
    x = np.asarray(x)
    top = int(x.max())
    if top < 8 * len(x) and int(x.min()) >= 0:
        mark = np.zeros(top + 1, dtype=bool)
        mark[x] = True
        return np.flatnonzero(mark).astype(np.int64, copy=False)
    y = np.array(x)
    y.sort()
    first = np.empty(len(y), dtype=bool)  # not np.r_: its index parsing costs ~7 us a call
    first[0] = True
    np.not_equal(y[1:], y[:-1], out=first[1:])
    return y[first].astype(np.int64, copy=False)


def first_occurrence(x: np.ndarray) -> np.ndarray:
    """True where a value appears for the first time in ``x`` (what the index returned by
    ``np.unique(x, return_index=True)`` marks, in fewer calls). A strictly increasing ``x``,
    the usual batch of qids, is settled by one comparison."""
    count = len(x)
    if strictly_increasing(x):
        return np.ones(count, dtype=bool)
    order = x.argsort(kind="stable")  # stable: the first of a run is the earliest
    ordered = x[order]
    run_start = np.empty(count, dtype=bool)
    run_start[0] = True
    np.not_equal(ordered[1:], ordered[:-1], out=run_start[1:])
    out = np.empty(count, dtype=bool)
    out[order] = run_start
    return out


def insert_sorted(a: np.ndarray, pos: np.ndarray, values: np.ndarray) -> np.ndarray:
    """``np.insert(a, pos, values)`` for non-decreasing ``pos`` (values go in the order
    given): the same array, without np.insert's argsort of the positions and its checks."""
    out = np.empty(len(a) + len(values), dtype=a.dtype)
    at = pos + np.arange(len(values))
    keep = np.empty(len(out), dtype=bool)
    keep.fill(True)
    keep[at] = False
    out[at] = values
    out[keep] = a
    return out


def union_sorted(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Union of two sorted arrays of distinct values, in time linear in ``len(a)`` plus
    ``len(b) log len(a)``: ``b``'s values not in ``a``, joined to it and sorted stably,
    which merges the two runs in linear time (10-35% quicker than an insert at their
    searchsorted positions, from 4,096 + 500 to 300,000 + 75,000 values)."""
    if len(b) == 0:
        return np.asarray(a, dtype=np.int64)
    if len(a) == 0:
        return np.asarray(b, dtype=np.int64)
    new = a.take(a.searchsorted(b), mode="clip") != b
    return merge_sorted(a, b if new.all() else b[new]).astype(np.int64, copy=False)


def merge_sorted(*runs: np.ndarray) -> np.ndarray:
    """Sorted runs as one (a new array): joined, then a stable sort, which finds the
    runs and merges them in linear time, in place (np.sort would copy the joined runs
    once more). It took a quarter to a third of the time of inserting ``b`` at its
    searchsorted positions for the pair set's recent run (0.25 against 0.95 ms for 20,000
    keys into 140,000; 4.4 against 15.6 ms for 280,000 into 2,000,000)."""
    joined = np.concatenate(runs)
    joined.sort(kind="stable")
    return joined


class SortedQueue:
    """A set of non-negative integers taken out smallest first, a prefix at a time.

    Held as two sorted runs of distinct values that may share members: a large one read from
    an offset (taking a prefix is a slice: nothing is copied) and a small one that takes the
    additions. The small run is merged into the large one once it outgrows a quarter of it,
    so adding k values costs about k log k plus amortised O(k), and taking k values costs
    O(k) plus the small run, not the size of the set. What comes out depends only on the
    set, never on how it is split between the runs.
    """

    MERGE_FLOOR = 4096  # the small run may hold this many values before any merge

    def __init__(self, values: np.ndarray | None = None) -> None:
        self.big = uniq(values) if values is not None else np.zeros(0, dtype=np.int64)
        self.small = np.zeros(0, dtype=np.int64)

    def __bool__(self) -> bool:
        return bool(len(self.big) or len(self.small))

    def add(self, values: np.ndarray, ordered: bool = False) -> None:
        """Add ``values`` (``ordered``: already sorted and distinct, as a taken prefix is)."""
        if len(values) == 0:
            return
        self.small = union_sorted(self.small, values if ordered else uniq(values))
        if len(self.small) > max(self.MERGE_FLOOR, len(self.big) // 4):
            self.big, self.small = union_sorted(self.big, self.small), self.small[:0]

    def put_back(self, values: np.ndarray) -> None:
        """Return ``values`` (sorted and distinct) taken by the last :meth:`take`: they lie
        below every member, so they go in front of a run without a merge."""
        if len(values) == 0:
            return
        small, big, top = self.small, self.big, values[-1]
        if (len(small) and top >= small[0]) or (len(big) and top >= big[0]):
            self.add(values, ordered=True)  # not below every member: the general path
            return
        values = values.astype(np.int64, copy=False)
        if len(small) + len(values) > max(self.MERGE_FLOOR, len(big) // 4):
            # in front of the large run instead: one copy of it, not the merge of both
            # runs that a small run this long would call for (a planning round puts back
            # most of what it took, and a merge each round cost several times the copy)
            self.big = np.concatenate([values, big])
        else:
            self.small = np.concatenate([values, small])

    def take(self, k: int) -> np.ndarray:
        """Remove and return the ``k`` smallest values (fewer if the set is smaller)."""
        if k <= 0:
            return self.big[:0]
        if not len(self.small):
            out, self.big = self.big[:k], self.big[k:]
            return out
        a, b = self.big[:k], self.small[:k]
        # k values of one run bound the answer: the other run's values above its k-th
        # cannot be among the k smallest (the union of both prefixes is cut to k anyway)
        if len(a) == k:
            b = b[:int(b.searchsorted(a[-1], side="right"))]
        if len(b) == k:
            a = a[:int(a.searchsorted(b[-1], side="right"))]
        out = union_sorted(a, b)[:k]
        if len(out):
            last = out[-1]
            self.big = self.big[int(a.searchsorted(last, side="right")):]
            self.small = self.small[int(b.searchsorted(last, side="right")):]
        return out

    def values(self) -> np.ndarray:
        """Every value, sorted and distinct (for snapshots)."""
        return union_sorted(self.big, self.small)
