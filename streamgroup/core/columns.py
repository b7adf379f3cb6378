"""Growable, named numpy columns of equal length (struct-of-arrays state)."""

from __future__ import annotations

from typing import Any

import numpy as np


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
                arr = np.full(new_cap, fill, dtype=dt)
                arr[:start] = self.data[k][:start]
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


def uniq(x: np.ndarray) -> np.ndarray:
    """Sorted distinct values (a plain sort: faster than np.unique's hashing for ints)."""
    if len(x) < 2:
        return np.asarray(x, dtype=np.int64)
    y = np.sort(x)
    return y[np.r_[True, y[1:] != y[:-1]]]


def union_sorted(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Union of two sorted arrays of distinct values, in time linear in ``len(a)`` plus
    ``len(b) log len(a)`` (one insert instead of sorting both again)."""
    if len(b) == 0:
        return np.asarray(a, dtype=np.int64)
    if len(a) == 0:
        return np.asarray(b, dtype=np.int64)
    pos = np.searchsorted(a, b)
    known = a[np.minimum(pos, len(a) - 1)] == b
    return np.insert(a, pos[~known], b[~known]).astype(np.int64, copy=False)
