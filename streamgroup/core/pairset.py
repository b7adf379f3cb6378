"""A compact set of (pair, source) triples: each one counts once."""

from __future__ import annotations

import numpy as np

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


class PairSet:
    """Sorted uint64 array plus a small recent set, merged geometrically.

    About 8 bytes per member once merged, versus ~70 for a Python set of ints.
    """

    def __init__(self) -> None:
        self.sorted = np.zeros(0, dtype=np.uint64)
        self.recent: set[int] = set()

    def __len__(self) -> int:
        return len(self.sorted) + len(self.recent)

    def _in_sorted(self, keys: np.ndarray) -> np.ndarray:
        if len(self.sorted) == 0:
            return np.zeros(len(keys), dtype=bool)
        pos = np.searchsorted(self.sorted, keys)
        pos = np.minimum(pos, len(self.sorted) - 1)
        return self.sorted[pos] == keys

    def add_new(self, keys: np.ndarray) -> np.ndarray:
        """Add keys in order; return a mask of those that were new (first of their kind)."""
        old = self._in_sorted(keys)
        new = np.zeros(len(keys), dtype=bool)
        recent = self.recent
        for i, k in enumerate(keys.tolist()):
            if old[i] or k in recent:
                continue
            recent.add(k)
            new[i] = True
        if len(recent) > max(65_536, len(self.sorted) // 4):
            self.merge()
        return new

    def contains(self, keys: np.ndarray) -> np.ndarray:
        old = self._in_sorted(keys)
        return old | np.fromiter((k in self.recent for k in keys.tolist()), dtype=bool,
                                 count=len(keys))

    def merge(self) -> None:
        if self.recent:
            extra = np.fromiter(self.recent, dtype=np.uint64, count=len(self.recent))
            self.sorted = np.union1d(self.sorted, extra)
            self.recent = set()

    def to_bytes(self) -> bytes:
        self.merge()
        return self.sorted.tobytes()

    @classmethod
    def from_bytes(cls, data: bytes) -> PairSet:
        out = cls()
        out.sorted = np.frombuffer(data, dtype=np.uint64).copy()
        return out
