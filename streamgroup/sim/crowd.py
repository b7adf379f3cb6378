"""A simulated crowd answering pairwise questions about items with hidden sides.

Invented scenario: ceramic shards dug at one site, fired in one of two kilns ("north" or
"south"); the keys look like ``shard-000042``. Each source has its own bias delta: it
answers right with probability (1+delta)/2. The noise is persistent: the same source asked
the same pair again gives the same answer. Answers can be delayed, duplicated and
delivered out of order.
"""

from __future__ import annotations

import heapq
from collections.abc import Sequence

import numpy as np

from ..core.planner import mix as _mix
from ..core.types import Answer, Question


def mixed_sources(count: int = 200) -> list[float]:
    """The mixed crowd of the benchmarks: 70% careful (0.6), 20% random (0), 10% wrong (-0.4)."""
    careful = round(count * 0.7)
    random_ = round(count * 0.2)
    wrong = count - careful - random_
    return [0.6] * careful + [0.0] * random_ + [-0.4] * wrong


class Crowd:
    """Hidden sides plus a pool of sources; answers questions deterministically per seed."""

    def __init__(
        self,
        n: int,
        *,
        delta: float = 0.6,
        sources: Sequence[float] | None = None,
        seed: int = 0,
        prefix: str = "shard",
        latency_ms: tuple[int, int] = (0, 0),
        duplicate_rate: float = 0.0,
        anonymous: bool = False,
    ) -> None:
        if n < 2:
            raise ValueError("a crowd needs at least two items")
        self.n = n
        self.rng = np.random.default_rng(seed)
        self.seed = seed
        self.truth = self.rng.integers(0, 2, size=n, dtype=np.int8)
        width = max(6, len(str(n - 1)))
        self.keys = [f"{prefix}-{i:0{width}d}" for i in range(n)]
        self.index = {k: i for i, k in enumerate(self.keys)}
        self.deltas = np.asarray(sources if sources is not None else [delta], dtype=float)
        self.source_names = (
            [""] if anonymous and sources is None
            else [f"src-{j:03d}" for j in range(len(self.deltas))]
        )
        self.latency_ms = latency_ms
        self.duplicate_rate = duplicate_rate
        self._queue: list[tuple[int, int, Answer]] = []
        self._seq = 0
        self.asked = 0

    # -- truth -----------------------------------------------------------------
    def side_of(self, key: str) -> int:
        return int(self.truth[self.index[key]])

    def label_of(self, key: str) -> str:
        return ("north", "south")[self.side_of(key)]

    # -- answering -------------------------------------------------------------
    def answers_for(self, a: np.ndarray, b: np.ndarray, src: np.ndarray) -> np.ndarray:
        """Vectorised persistent answers (True = "same") for index arrays."""
        lo = np.minimum(a, b).astype(np.uint64)
        hi = np.maximum(a, b).astype(np.uint64)
        h = _mix((lo << np.uint64(32)) ^ hi ^ _mix(src.astype(np.uint64) + np.uint64(self.seed)))
        u = (h >> np.uint64(11)).astype(np.float64) / float(1 << 53)
        correct = u < (1.0 + self.deltas[src]) / 2.0
        truly_same = self.truth[a] == self.truth[b]
        return np.where(correct, truly_same, ~truly_same)

    def pick_sources(self, count: int) -> np.ndarray:
        return self.rng.integers(0, len(self.deltas), size=count)

    def answer_now(self, questions: Sequence[Question]) -> list[Answer]:
        """Answer each question at once, each by a randomly chosen source."""
        if not questions:
            return []
        a_keys = [q.a for q in questions]
        b_keys = [q.b for q in questions]
        same, names = self.answer_keys(a_keys, b_keys)
        return [Answer(q.a, q.b, s, n, q.qid)
                for q, s, n in zip(questions, same, names, strict=True)]

    def answer_keys(self, a_keys: Sequence[str], b_keys: Sequence[str]
                    ) -> tuple[list[bool], list[str]]:
        """:meth:`answer_now` on key columns: ("same" flags, source names), one per pair."""
        count = len(a_keys)
        index = self.index
        a = np.fromiter(map(index.__getitem__, a_keys), dtype=np.int64, count=count)
        b = np.fromiter(map(index.__getitem__, b_keys), dtype=np.int64, count=count)
        src = self.pick_sources(count)
        same = self.answers_for(a, b, src)
        self.asked += count
        names = self.source_names
        return same.tolist(), [names[j] for j in src.tolist()]

    def ask(self, questions: Sequence[Question], now_ms: int) -> None:
        """Queue answers to arrive after a random latency (possibly duplicated)."""
        lo, hi = self.latency_ms
        answers = self.answer_now(questions)
        count = len(answers)
        delays = self.rng.integers(lo, hi + 1, size=count) if hi > lo else [lo] * count
        dups = self.rng.random(len(answers)) < self.duplicate_rate
        for ans, d, dup in zip(answers, delays, dups, strict=True):
            for _ in range(2 if dup else 1):
                self._seq += 1
                extra = int(self.rng.integers(0, hi + 1)) if dup and hi > 0 else 0
                heapq.heappush(self._queue, (now_ms + int(d) + extra, self._seq, ans))

    def due(self, now_ms: int) -> list[Answer]:
        """Answers whose time has come, in arrival order (which is not question order)."""
        out: list[Answer] = []
        while self._queue and self._queue[0][0] <= now_ms:
            out.append(heapq.heappop(self._queue)[2])
        return out

    @property
    def in_transit(self) -> int:
        return len(self._queue)
