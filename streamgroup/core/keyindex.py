"""Item keys and their dense indices, in a few bytes per key.

A Python ``dict`` of ``str`` to ``int`` costs well over 100 bytes per key. Here the keys
live in one UTF-8 blob with an offsets array, and lookups go through an open-addressing
table of 64-bit hashes (numpy), about 45 bytes per key in all. Hashes are Python's own
(salted per process), so the table is rebuilt, never stored.
"""

from __future__ import annotations

from collections.abc import Iterator, Sequence
from itertools import repeat
from operator import eq, itemgetter
from typing import Any

import numpy as np

from .types import KeyRowAnswers

_EMPTY = 0  # table cells hold index + 1


def cache_size_for(max_outstanding: int) -> int:
    """A key cache that holds the keys in play: both items of every question in flight,
    plus room for the rest (a cache smaller than that is emptied over and over, and a
    lookup that misses costs several times one that hits: measured 7.5 against 5.3 us per
    packed answer with 300,000 items in play, scripts/bench_batch.py --packed --items
    300000). Between 2**17 and 2**20 keys, about 100 bytes each (and as many slots of the
    strings cache of ``keys_of``, about 16 bytes each plus the strings not in the dict)."""
    return min(max(KeyIndex.CACHE, 2 * max_outstanding + (1 << 16)), 1 << 20)


class KeyIndex:
    """Append-only map between keys and 0..n-1."""

    CACHE = 1 << 17  # recently used keys kept in a plain dict for speed (the default)

    def __init__(self, cache_size: int = CACHE) -> None:
        self.n = 0
        # emptied when full: it should hold every key in play (see cache_size_for)
        self.cache_size = cache_size
        self.cache: dict[str, int] = {}
        # keys_of's cache of key strings, direct-mapped: slot i & (len - 1) holds key i
        # (the index in _slot_idx, -1 when empty); grown with n up to cache_size slots
        self._slot_idx = np.full(1, -1, dtype=np.int64)
        self._slot_key = np.empty(1, dtype=object)
        self.blob = bytearray()
        # the byte length every key has, while they all have one (0: no key yet; -1: they
        # differ): the blob is then a matrix of one key per row (``key_rows``)
        self.width = 0
        self.offsets = np.zeros(17, dtype=np.int64)
        self.hashes = np.zeros(16, dtype=np.int64)
        self.table = np.zeros(32, dtype=np.int64)

    # -- reading ------------------------------------------------------------------------
    def __len__(self) -> int:
        return self.n

    def __getitem__(self, i: int) -> str:
        if not 0 <= i < self.n:
            raise IndexError(i)
        o = self.offsets
        return self.blob[o[i]:o[i + 1]].decode("utf-8")

    def __iter__(self) -> Iterator[str]:
        for i in range(self.n):
            yield self[i]

    def __contains__(self, key: object) -> bool:
        return isinstance(key, str) and self.get(key) is not None

    def get(self, key: str, default: Any = None) -> Any:
        i = int(self.lookup([key])[0])
        return default if i < 0 else i

    def keys_of(self, idx: Sequence[int]) -> list[str]:
        """The keys at ``idx``. Keys handed out or looked up lately come from a cache of
        their strings; the rest are decoded from the blob (:meth:`_decode`)."""
        idx = np.asarray(idx, dtype=np.int64)
        if len(idx) < 8:
            o, blob = self.offsets, self.blob
            return [blob[o[i]:o[i + 1]].decode("utf-8") for i in idx.tolist()]
        slot = idx & (len(self._slot_idx) - 1)
        got = self._slot_key[slot]
        miss = (self._slot_idx[slot] != idx).nonzero()[0]
        if len(miss):
            fill = np.fromiter(self._decode(idx[miss]), dtype=object, count=len(miss))
            got[miss] = fill
            self._keep(idx[miss], fill)
        return got.tolist()

    def key_rows(self, idx: np.ndarray) -> np.ndarray | None:
        """The UTF-8 bytes of the keys at ``idx`` as the rows of a uint8 matrix, when every
        key has the same length in bytes (else None): a copy gathered by numpy, with no
        string made per key."""
        if self.width <= 0:
            return None
        # one element of `width` bytes per key: a gather of blocks, not of single bytes
        rows = np.frombuffer(self.blob, dtype=f"V{self.width}", count=self.n)
        out = rows[idx]  # a copy: the view goes at once (the bytearray must stay growable)
        del rows
        return out.view(np.uint8).reshape(len(out), self.width)

    def _keep(self, idx: np.ndarray, keys: np.ndarray) -> None:
        """Hold the strings ``keys`` of the indices ``idx`` in keys_of's cache."""
        size = len(self._slot_idx)
        limit = 1 << (self.cache_size - 1).bit_length()  # cache_size, rounded up to 2**k
        if size < limit and size < self.n:  # grow (emptied) with n, up to the limit
            size = min(limit, max(1024, 1 << (self.n - 1).bit_length()))
            self._slot_idx = np.full(size, -1, dtype=np.int64)
            self._slot_key = np.empty(size, dtype=object)
        slot = idx & (size - 1)
        self._slot_idx[slot] = idx
        # two indices sharing a slot: keep the string of the one whose index stayed
        ok = self._slot_idx[slot] == idx
        self._slot_key[slot[ok]] = keys[ok]

    def _decode(self, idx: np.ndarray) -> list[str]:
        """The keys at ``idx`` from the blob: gathered into one NUL-separated buffer by numpy
        and decoded and split once (keys never hold NUL), not a slice and a decode per key."""
        if self.width > 0:  # keys of one length: whole rows, no index per byte
            return KeyRowAnswers.texts(self.key_rows(idx))
        o = self.offsets
        starts = o[idx]
        lens = o[idx + 1] - starts
        width = lens + 1  # each key and its separator
        out_at = np.cumsum(width) - width
        src = np.arange(int(width.sum()), dtype=np.int64) + np.repeat(starts - out_at, width)
        blob = np.frombuffer(self.blob, dtype=np.uint8)  # a short-lived view: the
        np.minimum(src, len(blob) - 1, out=src)  # bytearray cannot grow while it exists
        buf = blob[src]
        del blob
        buf[out_at + lens] = 0
        return buf.tobytes().decode("utf-8").split("\0")[:-1]

    def lookup(self, keys: Sequence[str]) -> np.ndarray:
        """Index of each key, or -1."""
        count = len(keys)
        try:  # the usual batch: every key cached, one C call (about half a map of get)
            if count > 1:
                return np.fromiter(itemgetter(*keys)(self.cache), dtype=np.int64, count=count)
        except KeyError:
            pass
        out = np.fromiter(map(self.cache.get, keys, repeat(-1)), dtype=np.int64, count=count)
        miss = np.nonzero(out < 0)[0]
        if len(miss):
            rest = [keys[q] for q in miss.tolist()]
            h = np.fromiter((hash(k) for k in rest), dtype=np.int64, count=len(rest))
            found = self._find(rest, h)
            out[miss] = found
            self._remember(rest, found)
        return out

    def lookup_guessed(self, keys: Sequence[str], guess: np.ndarray) -> np.ndarray:
        """:meth:`lookup`, given each key's likely index (or -1) in ``guess``: a guess whose
        string is cached (an answer's keys are those of the question it answers) is
        confirmed by one string comparison, without hashing the key or probing the dict.
        When every guess holds, the result is ``guess`` itself (callers may test ``is``)."""
        count = len(keys)
        given = guess >= 0
        if count == 0 or not np.count_nonzero(given):
            return self.lookup(keys)
        slot = guess & (len(self._slot_idx) - 1)
        try:
            ok = np.fromiter(map(eq, keys, self._slot_key[slot].tolist()), dtype=bool,
                             count=count)
        except (TypeError, ValueError):  # not text: lookup raises as it always did
            return self.lookup(keys)
        ok &= self._slot_idx[slot] == guess
        ok &= given
        if np.count_nonzero(ok) == count:
            return guess
        out = np.where(ok, guess, -1)
        rest = (~ok).nonzero()[0]
        out[rest] = self.lookup([keys[k] for k in rest.tolist()])
        return out

    def _remember(self, keys: Sequence[str], idx: np.ndarray) -> None:
        if len(self.cache) + len(keys) > self.cache_size:
            self.cache = {}
        self.cache.update((k, i) for k, i in zip(keys, idx.tolist(), strict=True) if i >= 0)
        known = np.flatnonzero(idx >= 0)
        if len(known):  # the same strings serve keys_of
            self._keep(idx[known], np.fromiter((keys[q] for q in known.tolist()),
                                               dtype=object, count=len(known)))

    def _find(self, keys: Sequence[str], h: np.ndarray) -> np.ndarray:
        out = np.full(len(h), -1, dtype=np.int64)
        if self.n == 0 or len(h) == 0:
            return out
        mask = len(self.table) - 1
        pos = h & mask
        active = np.arange(len(h))
        while len(active):
            cell = self.table[pos[active]]
            live = cell != _EMPTY
            active, cell = active[live], cell[live] - 1
            hit = self.hashes[cell] == h[active]
            if hit.any():
                hits = np.nonzero(hit)[0]
                stored = self.keys_of(cell[hits])
                ok = np.fromiter(
                    (k == keys[q] for k, q in zip(stored, active[hits].tolist(), strict=True)),
                    dtype=bool, count=len(hits))
                found = hits[ok]
                out[active[found]] = cell[found]
                keep = np.ones(len(active), dtype=bool)
                keep[found] = False
                active = active[keep]
            pos[active] = (pos[active] + 1) & mask
        return out

    # -- writing ------------------------------------------------------------------------
    def add(self, keys: Sequence[str]) -> np.ndarray:
        """Indices of ``keys``, appending the unknown ones in order of first appearance."""
        out = self.lookup(keys)
        missing = np.nonzero(out < 0)[0]
        if len(missing) == 0:
            return out
        fresh: dict[str, int] = {}
        new_pos: list[int] = []
        for q in missing.tolist():
            k = keys[q]
            i = fresh.get(k)
            if i is None:
                i = fresh[k] = self.n + len(fresh)
                new_pos.append(q)
            out[q] = i
        new_keys = [keys[q] for q in new_pos]
        self._append(new_keys, np.fromiter((hash(k) for k in new_keys), dtype=np.int64,
                                           count=len(new_keys)))
        self._remember(new_keys, np.arange(self.n - len(new_keys), self.n))
        return out

    def _append(self, keys: list[str], h: np.ndarray) -> None:
        start, count = self.n, len(keys)
        need = start + count
        if need + 1 > len(self.offsets):
            cap = max(need + 1, len(self.offsets) + len(self.offsets) // 4)
            self.offsets = np.resize(self.offsets, cap)
            self.hashes = np.resize(self.hashes, cap)
        encoded = [k.encode("utf-8") for k in keys]
        lengths = np.fromiter((len(e) for e in encoded), dtype=np.int64, count=count)
        self.offsets[start + 1:need + 1] = self.offsets[start] + np.cumsum(lengths)
        if count and self.width >= 0:
            lo, hi = int(lengths.min()), int(lengths.max())
            self.width = lo if lo == hi and self.width in (0, lo) else -1
        self.blob += b"".join(encoded)
        self.hashes[start:need] = h
        self.n = need
        if need * 2 > len(self.table):
            size = len(self.table)
            while need * 2 > size:
                size *= 2
            self.table = np.zeros(size, dtype=np.int64)
            self._insert(np.arange(need))
        else:
            self._insert(np.arange(start, need))

    def _insert(self, idx: np.ndarray) -> None:
        mask = len(self.table) - 1
        pos = self.hashes[idx] & mask
        todo = np.arange(len(idx))
        while len(todo):
            p = pos[todo]
            free = self.table[p] == _EMPTY
            # among claimants of one free cell, the first wins; the rest move on
            _, first = np.unique(p, return_index=True)
            win = np.zeros(len(todo), dtype=bool)
            win[first] = True
            win &= free
            self.table[p[win]] = idx[todo[win]] + 1
            todo = todo[~win]
            pos[todo] = (pos[todo] + 1) & mask

    # -- snapshot -----------------------------------------------------------------------
    def to_state(self) -> dict[str, bytes]:
        return {"blob": bytes(self.blob), "offsets": self.offsets[: self.n + 1].tobytes()}

    @classmethod
    def from_state(cls, st: dict[str, bytes], cache_size: int = CACHE) -> KeyIndex:
        out = cls(cache_size)
        offsets = np.frombuffer(st["offsets"], dtype=np.int64)
        n = len(offsets) - 1
        blob = st["blob"]
        keys = [blob[offsets[i]:offsets[i + 1]].decode("utf-8") for i in range(n)]
        out._append(keys, np.fromiter((hash(k) for k in keys), dtype=np.int64, count=n))
        return out

    def nbytes(self) -> int:
        return len(self.blob) + self.offsets.nbytes + self.hashes.nbytes + self.table.nbytes
