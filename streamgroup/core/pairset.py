"""A compact set of (pair, source) triples: each one counts once."""

from __future__ import annotations

import numpy as np

from .columns import insert_sorted

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
    """Two sorted uint64 arrays: a large settled one and a small recent one that is merged
    into it geometrically (8 bytes per member, all checks vectorised)."""

    def __init__(self) -> None:
        self.sorted = np.zeros(0, dtype=np.uint64)
        self.recent = np.zeros(0, dtype=np.uint64)

    def __len__(self) -> int:
        return len(self.sorted) + len(self.recent)

    @staticmethod
    def _member(arr: np.ndarray, keys: np.ndarray, at: np.ndarray | None = None
                ) -> np.ndarray:
        """Whether each of ``keys`` is in the sorted ``arr`` (``at``: their places in it,
        when known)."""
        if len(arr) == 0:
            return np.zeros(len(keys), dtype=bool)
        return arr.take(arr.searchsorted(keys) if at is None else at, mode="clip") == keys

    def contains(self, keys: np.ndarray) -> np.ndarray:
        return self._member(self.sorted, keys) | self._member(self.recent, keys)

    def add_new(self, keys: np.ndarray) -> np.ndarray:
        """Add keys in order; return a mask of those that were new (first of their kind).

        The keys are sorted once (stably, so the first of a run of equal keys is the
        earliest): that one order finds the repeats within the batch, speeds the searches
        (sorted needles), and gives the fresh keys sorted and their places in the recent run.
        """
        keys = np.asarray(keys, dtype=np.uint64)
        count = len(keys)
        if count == 0:
            return np.zeros(0, dtype=bool)
        order = keys.argsort(kind="stable")
        ordered = keys[order]
        fresh_mask = np.empty(count, dtype=bool)
        fresh_mask[0] = True
        np.not_equal(ordered[1:], ordered[:-1], out=fresh_mask[1:])
        if len(self.sorted):
            fresh_mask &= ~self._member(self.sorted, ordered)
        at = self.recent.searchsorted(ordered)
        if len(self.recent):
            fresh_mask &= ~self._member(self.recent, ordered, at)
        new = np.empty(count, dtype=bool)
        new[order] = fresh_mask
        if np.count_nonzero(fresh_mask):
            self.recent = insert_sorted(self.recent, at[fresh_mask], ordered[fresh_mask])
            # each batch copies the recent run once, and each merge copies everything: a
            # recent run of about sqrt(2000 n) keeps the sum of both small (measured: a
            # third less time per batch of 500 at 1.5M members than a run of n / 4)
            if len(self.recent) > max(8192, int((len(self.sorted) * 2000) ** 0.5)):
                self.merge()
        return new

    def merge(self) -> None:
        if len(self.recent):
            # both runs are sorted and disjoint: a stable sort merges them in linear time
            self.sorted = np.sort(np.concatenate([self.sorted, self.recent]), kind="stable")
            self.recent = np.zeros(0, dtype=np.uint64)

    def to_bytes(self) -> bytes:
        self.merge()
        return self.sorted.tobytes()

    @classmethod
    def from_bytes(cls, data: bytes) -> PairSet:
        out = cls()
        out.sorted = np.frombuffer(data, dtype=np.uint64).copy()
        return out
