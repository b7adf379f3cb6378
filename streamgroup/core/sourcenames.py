"""Source names given as byte rows, looked up among the names an engine knows.

A column pack from a producer that names its sources with one length in bytes (``w-017``,
``assay-04``) decodes to a matrix of rows (:class:`~streamgroup.core.types.SourceRows`).
Each row is read as a few 64-bit words (zero-padded to a multiple of 8 bytes) folded into
one 64-bit code, and the code is looked up in a small open-addressing table of the known
names of that length (linear probing, at most a sixteenth full). A row counts as found only
when its words equal the found name's, so two names sharing a code (possible, never
seen) send the batch down the general path rather than to the wrong source.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

# Two odd multipliers (any odd one is correct: every find is checked byte for byte; these
# only spread the codes). _FOLD is 2**64 over the golden ratio, as in core/pairset.py
# (Knuth, TAOCP vol. 3, section 6.4); _SPREAD is the first multiplier of SplitMix64's
# finaliser (Steele, Lea and Flood, "Fast splittable pseudorandom number generators",
# 2014), written from memory.
_FOLD = np.uint64(0x9E3779B97F4A7C15)  # folding word by word keeps every bit
_SPREAD = np.uint64(0xBF58476D1CE4E5B9)  # a code's slot is its product's top bits
MIN_SLOT_BITS = 8
SLOTS_PER_NAME = 16  # at least: most rows find their name in its first slot


def _words(rows: np.ndarray) -> np.ndarray:
    """The rows zero-padded to a multiple of 8 bytes, as (n, words) uint64."""
    n, width = rows.shape
    padded = -(-width // 8) * 8
    if padded != width or not rows.flags.c_contiguous:
        out = np.zeros((n, padded), dtype=np.uint8)
        out[:, :width] = rows
        rows = out
    return rows.view(np.uint64)


def _fold(words: np.ndarray) -> np.ndarray:
    code = words[:, 0].copy()
    for j in range(1, words.shape[1]):
        code *= _FOLD
        code ^= words[:, j]
    return code


class _Table:
    """The known names of one byte length: their words and ids, and slots of codes."""

    def __init__(self, seen: int, words: np.ndarray, ids: np.ndarray) -> None:
        self.seen = seen  # how many names the engine knew when this was built
        self.words, self.ids = words, ids
        self.bits = max(MIN_SLOT_BITS, (SLOTS_PER_NAME * len(ids)).bit_length())
        self.slots = np.full(1 << self.bits, -1, dtype=np.int32)  # a name's row, or -1
        self.probes = 0  # the longest run of slots a name's lookup walks
        mask = len(self.slots) - 1
        pending = np.arange(len(ids))
        pos = self._home(_fold(words))
        while len(pending):  # rounds of claims: a slot's last writer keeps it
            self.probes += 1
            at = pos[pending]
            free = self.slots[at] == -1
            claim = pending[free]
            self.slots[at[free]] = claim
            kept = np.zeros(len(pending), dtype=bool)
            kept[free] = self.slots[at[free]] == claim
            pending = pending[~kept]
            pos[pending] = (pos[pending] + 1) & mask

    def _home(self, codes: np.ndarray) -> np.ndarray:
        return ((codes * _SPREAD) >> np.uint64(64 - self.bits)).astype(np.int64)

    def find(self, words: np.ndarray) -> np.ndarray | None:
        """Each row's id, or None if some row is not a known name."""
        mask = len(self.slots) - 1
        pos = self._home(_fold(words))
        out: np.ndarray | None = None
        todo = None  # the rows still looked for (None: all of them)
        for _ in range(self.probes):
            at = self.slots.take(pos)
            if np.count_nonzero(at < 0):
                return None  # an empty slot before the name: not a known name
            hit = (self.words.take(at, axis=0) == words).all(axis=1)
            if out is None:
                out = self.ids.take(at)  # (right where hit; the rest is set below)
            elif np.count_nonzero(hit):
                out[todo[hit]] = self.ids.take(at[hit])
            if hit.all():
                return out
            miss = (~hit).nonzero()[0]
            todo = miss if todo is None else todo.take(miss)
            words, pos = words.take(miss, axis=0), (pos.take(miss) + 1) & mask
        return None


class NameRows:
    """The ids of source names given as byte rows, for one engine's list of names (which
    only grows: a table per width is rebuilt when the list has grown since)."""

    def __init__(self) -> None:
        self._encoded: list[bytes] = []  # the names as UTF-8, kept as the list grows
        self._tables: dict[int, _Table] = {}

    def ids(self, rows: np.ndarray, names: Sequence[str]) -> np.ndarray | None:
        """Each row's index in ``names``, or None if some row is not a known name."""
        n, width = rows.shape
        if n == 0:
            return np.zeros(0, dtype=np.int64)
        table = self._tables.get(width)
        if table is None or table.seen != len(names):
            table = self._tables[width] = self._table(width, names)
        if not len(table.ids):
            return None
        return table.find(_words(rows))

    def _table(self, width: int, names: Sequence[str]) -> _Table:
        encoded = self._encoded
        encoded += [name.encode() for name in names[len(encoded):]]
        ids = np.array([i for i, e in enumerate(encoded) if len(e) == width], dtype=np.int64)
        rows = np.frombuffer(b"".join(encoded[i] for i in ids.tolist()), dtype=np.uint8)
        return _Table(len(names), _words(rows.reshape(len(ids), width)), ids)
