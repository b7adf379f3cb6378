"""A compact set of (pair, source) triples: each one counts once."""

from __future__ import annotations

import numpy as np

from .columns import merge_sorted

ITEM_BITS = 24  # up to 16,777,216 items per engine
SOURCE_BITS = 16  # up to 65,536 sources
MAX_ITEMS = 1 << ITEM_BITS
MAX_SOURCES = 1 << SOURCE_BITS


def pair_keys(a: np.ndarray, b: np.ndarray, src: np.ndarray) -> np.ndarray:
    """One uint64 per (unordered pair, source)."""
    lo = np.minimum(a, b).astype(np.uint64)
    hi = np.maximum(a, b).astype(np.uint64)
    return (lo << np.uint64(ITEM_BITS + SOURCE_BITS)) | (hi << np.uint64(SOURCE_BITS)) | (
        src.astype(np.uint64)
    )


def _shift_for(bits: int) -> np.uint64:
    """The shift that leaves, of a 64-bit hash, the word of a filter of ``bits`` bits (a
    power of 2) and two 6-bit positions within it: log2(bits) + 6 bits."""
    return np.uint64(64 - (bits.bit_length() - 1) - 6)


# Fibonacci hashing (multiplicative, by 2**64 over the golden ratio; Knuth, TAOCP vol. 3,
# section 6.4; the constant from memory, checked: 2**64 / 1.6180339887... is
# 11400714819323198485.95, whose integer part is this odd number)
_HASH = np.uint64(0x9E3779B97F4A7C15)
FILTER_MIN_BITS = 1 << 16
FILTER_BITS_PER_KEY = 32  # at a rebuild; it is rebuilt when it falls to 8 (4 times the keys)


FRESH_MAX = 4096  # members the fresh run holds before it joins the recent one


class PairSet:
    """Three sorted uint64 arrays: a large settled one, a recent one merged into it
    geometrically, and a fresh one of at most ``FRESH_MAX`` members that takes each batch's
    new keys and joins the recent run when full (8 bytes per member, all checks
    vectorised); and a Bloom filter in front of them (1 to 4 bytes per member) that sets
    two bits a key in one 64-bit word.

    A batch of a few hundred keys thus copies a few thousand members, not the recent run
    (tens of thousands with a million members): 289-302 against 381-392 ns a key in
    batches of 200 at 1,000,000 members, and 104-107 against 100-104 in batches of
    20,000, which go straight to the recent run (``scripts/bench_pairset.py --members
    1000000 --batches 200,20000``, three alternated runs with the set of two runs).

    Nearly every key offered is new, and a binary search of a few million sorted keys
    costs 150-250 ns per key in cache misses; the filter says "certainly new" for all but
    0.5-5% of new keys (its false positives, measured at 32 and 8 bits a key; one hash
    gave 3-11%) in a few ns, so only those and the repeats are searched for
    (``scripts/bench_pairset.py``).
    """

    fresh_max = FRESH_MAX

    def __init__(self) -> None:
        self.sorted = np.zeros(0, dtype=np.uint64)
        self.recent = np.zeros(0, dtype=np.uint64)
        self.fresh = np.zeros(0, dtype=np.uint64)
        self._filter = np.zeros(FILTER_MIN_BITS // 64, dtype=np.uint64)
        self._shift = _shift_for(FILTER_MIN_BITS)

    def __len__(self) -> int:
        return len(self.sorted) + len(self.recent) + len(self.fresh)

    @property
    def nbytes(self) -> int:
        return (self.sorted.nbytes + self.recent.nbytes + self.fresh.nbytes
                + self._filter.nbytes)

    @staticmethod
    def _member(arr: np.ndarray, keys: np.ndarray) -> np.ndarray:
        """Whether each of ``keys`` is in the sorted ``arr``."""
        if len(arr) == 0:
            return np.zeros(len(keys), dtype=bool)
        return arr.take(arr.searchsorted(keys), mode="clip") == keys

    # -- the filter -------------------------------------------------------------------
    def _slots(self, keys: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """(word, bit mask) of each key's slot in the filter: two bits of one 64-bit word
        (one memory access, as with one hash, for half its false positives or fewer)."""
        h = keys * _HASH  # (modulo 2**64)
        h >>= self._shift
        six = np.uint64(63)
        mask = np.left_shift(np.uint64(1), h & six)
        mask |= np.left_shift(np.uint64(1), (h >> np.uint64(6)) & six)
        h >>= np.uint64(12)
        return h, mask

    def _maybe(self, keys: np.ndarray) -> np.ndarray:
        """False where a key is certainly not a member (True: it may be one)."""
        word, mask = self._slots(keys)
        hit = self._filter.take(word)
        hit &= mask
        return hit == mask

    def _mark(self, keys: np.ndarray) -> None:
        word, mask = self._slots(keys)
        # a buffered |= keeps one write per word: keys sharing a word (rare) go again
        # until every bit is in (a third of the time of np.bitwise_or.at)
        while len(word):
            self._filter[word] |= mask
            missing = (self._filter.take(word) & mask) != mask
            word, mask = word[missing], mask[missing]

    def _refilter(self, extra: int = 0) -> None:
        """A filter sized for the members (and ``extra`` more) at 32 bits per key."""
        want = max(FILTER_MIN_BITS, (len(self) + extra) * FILTER_BITS_PER_KEY)
        bits = 1 << (want - 1).bit_length()
        self._filter = np.zeros(bits // 64, dtype=np.uint64)
        self._shift = _shift_for(bits)
        self._mark(self.sorted)
        self._mark(self.recent)
        self._mark(self.fresh)

    # -- the set ----------------------------------------------------------------------
    def contains(self, keys: np.ndarray) -> np.ndarray:
        """Whether each key is a member: the filter first, then a search of the few it
        cannot rule out."""
        keys = np.asarray(keys, dtype=np.uint64)
        out = self._maybe(keys)
        idx = out.nonzero()[0]
        if len(idx):
            cand = keys.take(idx)
            found = self._member(self.sorted, cand)
            found |= self._member(self.recent, cand)
            found |= self._member(self.fresh, cand)
            out[idx] = found
        return out

    def add_new(self, keys: np.ndarray) -> np.ndarray:
        """Add keys in order; return a mask of those that were new (first of their kind).

        The keys are sorted once: that one order finds the repeats within the batch (the
        earliest of each run of equal keys is its first), speeds the searches (sorted
        needles), and gives the fresh keys sorted for the recent run.
        """
        keys = np.asarray(keys, dtype=np.uint64)
        count = len(keys)
        if count == 0:
            return np.zeros(0, dtype=bool)
        order = keys.argsort()  # (not stable: a quarter of the time of a stable sort)
        ordered = keys.take(order)
        starts = np.empty(count, dtype=bool)
        starts[0] = True
        np.not_equal(ordered[1:], ordered[:-1], out=starts[1:])
        starts = starts.nonzero()[0]
        distinct = ordered.take(starts)  # sorted
        first = order.take(starts) if len(starts) == count else (
            np.minimum.reduceat(order, starts))  # the earliest of each run
        fresh = ~self.contains(distinct)
        new = np.zeros(count, dtype=bool)
        if np.count_nonzero(fresh):
            new[first[fresh]] = True
            fresh_keys = distinct[fresh]
            if len(self) + len(fresh_keys) > self._filter.nbytes:  # under 8 bits a key
                self._refilter(len(fresh_keys))
            self._mark(fresh_keys)
            if len(self.fresh) + len(fresh_keys) <= self.fresh_max:
                self.fresh = merge_sorted(self.fresh, fresh_keys)
            else:
                self._settle(fresh_keys, count)
        return new

    def _settle(self, fresh_keys: np.ndarray, count: int) -> None:
        """The fresh run and ``fresh_keys`` into the recent run (one merge of the three),
        and that into the settled one once it has
        grown past about sqrt(2 n k) for batches of k keys: each join copies the recent
        run once, and each merge copies everything, and that bound keeps the sum of both
        small (measured: a third less time per batch of 500 at 1.5M members than a run
        of n / 4, with the bound sqrt(2000 n) used for batches of up to 1,000)."""
        self.recent = merge_sorted(self.recent, self.fresh, fresh_keys)
        self.fresh = self.fresh[:0]
        if len(self.recent) > max(8192, int((len(self.sorted) * max(2000, 2 * count))
                                            ** 0.5)):
            self.merge()

    def merge(self) -> None:
        """Every member into the settled run (one merge of the three runs)."""
        if len(self.recent) or len(self.fresh):
            self.sorted = merge_sorted(self.sorted, self.recent, self.fresh)
            self.recent = np.zeros(0, dtype=np.uint64)
            self.fresh = np.zeros(0, dtype=np.uint64)

    def to_bytes(self) -> bytes:
        self.merge()
        return self.sorted.tobytes()

    @classmethod
    def from_bytes(cls, data: bytes) -> PairSet:
        out = cls()
        out.sorted = np.frombuffer(data, dtype=np.uint64).copy()
        out._refilter()
        return out
