"""The placement engine: the one object the stream layer drives.

API (stable; the stream layer, the demo and the benchmarks code against it):

- ``Engine(config)``: constructors only store.
- ``validate_item(key, side) -> str | None`` and ``validate_answer(answer) -> str | None``:
  a human-readable reason the input would be rejected, or None. Nothing is applied.
- ``add_items([(key, side_or_None), ...]) -> list[str]``: ``"applied"`` or ``"duplicate"``
  per item. Raises :class:`EngineInputError` (and applies nothing) if any item is bad.
- ``add_answers([Answer, ...], now_ms) -> list[str]``: ``"applied"`` or ``"duplicate"`` per
  answer (a repeated qid or a repeated (pair, source) is a duplicate). Unknown item keys
  are registered as ``waiting`` items. Raises :class:`EngineInputError`, applying nothing,
  if any answer is bad.
- ``plan(now_ms) -> list[Question]``: the questions to send now.
- ``take_changes() -> list[Record]``: records that changed since the last call;
  ``take_updates()`` returns them together with the ones whose side or status changed.
- Column forms of the same calls for whole batches (no object per row; the worker's
  path): ``add_answer_columns(AnswerColumns, now_ms) -> bool array`` (True = applied),
  ``plan_columns(now_ms) -> QuestionColumns``, ``take_update_columns()``.
- ``record(key) -> Record | None``; ``stats() -> dict``; ``sources() -> list[dict]``;
  ``done() -> bool``.
- ``snapshot() -> bytes`` and ``Engine.restore(data) -> Engine``: a restored engine behaves
  exactly like the original (same future questions, qids and decisions).
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Sequence
from typing import Any

import numpy as np

from ..errors import EngineInputError
from . import noise, snapshot
from .block import BlockMixin
from .codes import (
    ASKING,
    PLACE,
    PLACED,
    Q_ANSWERED,
    Q_EXPIRED,
    Q_OPEN,
    REFIT_GROWTH,
    REFIT_MIN,
    SEED,
    STATUS_NAMES,
    UNRESOLVED,
    WAITING,
    WHY_NAMES,
)
from .columns import (
    ONE_I32,
    Columns,
    SortedQueue,
    first_occurrence,
    strictly_increasing,
    uniq,
)
from .decide import DecideMixin
from .intake import Intake, IntakeMixin
from .keyindex import KeyIndex, cache_size_for
from .ledger import UNPLACED, Ledger
from .pairset import MAX_ITEMS, PairSet, pair_keys
from .questions import QuestionsMixin
from .sourcenames import NameRows
from .sprt import threshold
from .types import (
    APPLIED,
    DUPLICATE,
    Answer,
    AnswerColumns,
    EngineConfig,
    KeyRowAnswers,
    Record,
    RecordColumns,
)

_ITEM_FIELDS: dict[str, tuple[Any, Any]] = {
    "status": (np.int8, WAITING),
    "inflight": (np.int32, 0),
    "asked": (np.int32, 0),
    "rev": (np.int32, 0),
    "first_ms": (np.int64, -1),
    "dirty": (np.bool_, False),
    "shown_side": (np.int8, UNPLACED),  # side and status last handed out by take_updates
    "shown_status": (np.int8, -1),
    "block": (np.int32, -1),  # position in the bootstrap block, or -1
}
_Q_FIELDS: dict[str, tuple[Any, Any]] = {
    "target": (np.int32, 0),
    "partner": (np.int32, 0),
    "ts": (np.int64, 0),
    "state": (np.int8, Q_OPEN),
    "why": (np.int8, PLACE),
}


def _check_config(c: EngineConfig) -> None:
    if not (0.0 < c.alpha < 0.5) or math.isnan(c.alpha):
        raise EngineInputError(f"alpha must be in (0, 0.5), got {c.alpha!r}")
    for name in ("inflight", "max_outstanding", "item_ceiling", "question_timeout_ms"):
        if getattr(c, name) < 1:
            raise EngineInputError(f"{name} must be at least 1, got {getattr(c, name)!r}")
    if c.budget < 0:
        raise EngineInputError(f"budget must be >= 0, got {c.budget!r}")
    if not (0 <= c.seed < 2**32):
        raise EngineInputError(f"seed must be in [0, 2**32), got {c.seed!r}")
    if not (0.0 <= c.alpha_slack <= 0.25):
        raise EngineInputError(f"alpha_slack must be in [0, 0.25], got {c.alpha_slack!r}")
    if not (0.0 <= c.check_rate <= 0.5):
        raise EngineInputError(f"check_rate must be in [0, 0.5], got {c.check_rate!r}")


class Engine(IntakeMixin, DecideMixin, BlockMixin, QuestionsMixin):
    """Evidence, decisions, noise learning and planning for one two-group deployment."""

    dirty_marks_floor = 1 << 16  # marks held at least before they are folded (see _mark_dirty)

    def __init__(self, config: EngineConfig | None = None) -> None:
        self.config = config or EngineConfig()
        _check_config(self.config)
        self._salt = int(self.config.seed) * 1_000_003  # every planning coin depends on the seed
        # the least evidence that can end a walk: the randomised boundary's lower edge
        self.boundary = threshold(min(0.499, self.config.alpha * (1 + self.config.alpha_slack)))
        self.ledger = Ledger()
        self.items = Columns(_ITEM_FIELDS)
        # the indices marked dirty since the last take_update_columns (with repeats): what
        # it looks at, instead of every item's flag (a scan of all items in every batch);
        # _dirty_count of them in all
        self._dirty_marks: list[np.ndarray] = []
        self._dirty_count = 0
        # records left over for later takes (take_update_columns with ``extra``): those a
        # take left (``_backlog``: sorted, distinct) and those marked while the engine
        # looks at every item after a refit (``_later``: a wave, published a few at a time)
        self._backlog = np.zeros(0, dtype=np.int64)
        self._later: list[np.ndarray] = []
        self._marking_later = False
        self.q = Columns(_Q_FIELDS, 64)
        self.q_low = 0  # every qid below this is answered or expired
        self.keys = KeyIndex(cache_size_for(self.config.max_outstanding))
        self.source_names: list[str] = []
        self.source_index: dict[str, int] = {}
        self.source_rows = NameRows()  # source names as byte rows -> ids (a cache)
        self.delta = np.zeros(0)
        self.se = np.zeros(0)
        self.src_answers = np.zeros(0)
        self.pooled = 0.0
        self.pooled_se = noise.SE_NEW
        self.labels: list[str | None] = [None, None]
        self.seen = PairSet()
        # the checked form of the last batch given to add_answer_columns (its source ids
        # filled in once applied): the worker journals it by qid when it is ``by_qid``
        self.last_intake: Intake | None = None
        self.pool = np.zeros(0, dtype=np.int64)  # reference members, in joining order
        self.pool_base = 0
        self.shared = 1.0  # chance two answers share a source (Herfindahl index of volume)
        # planning work lists: items to look at in the next round
        self.nudged: list[np.ndarray] = []
        self.carry = SortedQueue()  # items with room left when a round's room ran out
        self.cursor = 0  # items from here on have never been looked at by the planner
        self.phase = "boot"
        self.block = np.zeros(0, dtype=np.int64)
        self.block_state = np.zeros((0, 0), dtype=np.int8)  # 0 unasked, 1 asked, 2 answered
        self.counted_at_fit = 0
        self.issued = [0, 0, 0]
        self.spend = 0
        self.duplicates = 0
        self.revisions = 0
        self.outstanding = 0
        self.latencies: list[float] = []
        self.now_ms = 0

    # -- lookups ----------------------------------------------------------------
    def __len__(self) -> int:
        return len(self.keys)

    def label(self, slot: int) -> str:
        return self.labels[slot] or str(slot)

    def record(self, key: str) -> Record | None:
        i = self.keys.get(key)
        return None if i is None else self._record(i)

    def _record(self, i: int) -> Record:
        return self._records(np.array([i]))[0]

    def _records(self, idx: np.ndarray) -> list[Record]:
        return self._record_columns(idx).rows()

    def _record_columns(self, idx: np.ndarray) -> RecordColumns:
        led = self.ledger.items
        side = led["side"][idx]
        llr = led["llr"][idx]
        shown = np.where(side == 1, llr, np.where(side == 0, -llr, np.abs(llr))).round(6)
        return RecordColumns(None, side, self.items["status"][idx], shown,
                             led["count"][idx], self.items["rev"][idx], led["pinned"][idx],
                             (self.label(0), self.label(1)), STATUS_NAMES,
                             self.keys, idx)

    def take_changes(self) -> list[Record]:
        """Records changed since the last call (each item once, in item order)."""
        return self.take_updates()[0]

    def take_updates(self) -> tuple[list[Record], list[Record]]:
        """(records changed since the last call, those among them whose side or status
        changed: the decisions to publish; an item first seen as ``waiting`` has none)."""
        cols, moved = self.take_update_columns()
        return cols.rows(), cols.rows(moved)

    def take_update_columns(self, extra: int | None = None
                            ) -> tuple[RecordColumns, list[int]]:
        """:meth:`take_updates` as columns: (changed records, positions of the decisions).

        ``extra`` (a number): every record changed since the last call, except those of a
        refit's wave, plus at most ``extra`` of the records left over (the wave's, and
        what earlier calls left), lowest item numbers first; the others stay for the next
        calls (:meth:`unpublished`). What is left over after a call is exactly the set of
        changed items, which a snapshot keeps, so a replay takes the same records."""
        it = self.items
        marks, self._dirty_marks = self._dirty_marks, []
        dirty = uniq(np.concatenate(marks)) if marks else np.zeros(0, dtype=np.int64)
        left, self._later = self.left_over(), []
        if len(left) and len(dirty):
            left = left[~np.isin(left, dirty, assume_unique=True)]
        cut = len(left) if extra is None else extra
        self._backlog = left[cut:]
        if cut and len(left):
            dirty = np.union1d(dirty, left[:cut])
        self._dirty_count = len(self._backlog)
        out = self._record_columns(dirty)
        side, status = out.side, out.status
        seen = it["shown_status"][dirty]
        moved = (side != it["shown_side"][dirty]) | (status != seen)
        moved &= ~((seen < 0) & (status == WAITING))
        it["dirty"][dirty] = False
        it["shown_side"][dirty] = side
        it["shown_status"][dirty] = status
        return out, moved.nonzero()[0].tolist()

    def unpublished(self) -> int:
        """Changed records not taken yet (see take_update_columns): 0 when none; right
        after a take, exactly how many it left (before, marks may repeat an item)."""
        return self._dirty_count

    def take_latencies(self) -> list[float]:
        """Seconds from first question to commit, for items committed since the last call."""
        out, self.latencies = self.latencies, []
        return out

    def done(self) -> bool:
        st = self.items.view("status")
        return bool(len(st)) and bool(np.all((st == PLACED) | (st == UNRESOLVED)))

    def stats(self) -> dict[str, Any]:
        st = self.items.view("status")
        counts = np.bincount(st, minlength=4)
        return {
            "items": {name: int(counts[k]) for k, name in enumerate(STATUS_NAMES)},
            "spend": self.spend,
            "bootstrap_spend": int(self.issued[SEED]),
            "outstanding": self.outstanding,
            "issued": {name: int(self.issued[k]) for k, name in enumerate(WHY_NAMES)},
            "revisions": self.revisions,
            "duplicates": self.duplicates,
            "pooled_delta": round(self.pooled, 6),
            "pooled_se": round(self.pooled_se, 6),
            "phase": self.phase,
            "reference": len(self.pool),
            "sources": len(self.source_names),
        }

    def sources(self) -> list[dict[str, Any]]:
        counts = self.ledger.answers_per_source(len(self.source_names))
        return [
            {"source": name, "answers": int(counts[j]), "delta": round(float(self.delta[j]), 6),
             "se": round(float(self.se[j]), 6)}
            for j, name in enumerate(self.source_names)
        ]

    # -- input ------------------------------------------------------------------
    def add_items(self, items: Iterable[tuple[str, str | None]]) -> list[str]:
        batch = list(items)
        labels = list(self.labels)
        pins: dict[str, str] = {}
        for pos, row in enumerate(batch):
            if not isinstance(row, tuple) or len(row) != 2:
                raise EngineInputError(f"item {pos}: expected a (key, side) pair")
        known = self.keys.lookup([k if isinstance(k, str) else "" for k, _ in batch])
        for pos, ((key, side), i) in enumerate(zip(batch, known.tolist(), strict=True)):
            if i >= 0 and side is None:
                continue
            err = self.validate_item(key, side)
            if err is None and side is not None:
                slot = self._slot_for(side, labels)
                if slot is None:
                    err = f"side label {side!r} would be a third group"
                elif key in pins and pins[key] != side:
                    err = f"item {key!r} is pinned twice to different sides"
                else:
                    labels[slot] = side
                    pins[key] = side
            if err:
                raise EngineInputError(f"item {pos}: {err}")
        if len(self.keys) + len(batch) > MAX_ITEMS:
            raise EngineInputError(f"too many items (limit {MAX_ITEMS})")
        out = []
        relabelled = labels != self.labels
        self.labels = labels
        known = len(self.keys)
        idx = self._register_many([key for key, _ in batch])
        seen: set[int] = set()
        for (_, side), i in zip(batch, idx.tolist(), strict=True):
            fresh = i >= known and i not in seen
            seen.add(i)
            if side is None:
                out.append(APPLIED if fresh else DUPLICATE)
                continue
            if self.ledger.items["pinned"][i]:
                out.append(DUPLICATE)
                continue
            self._pin(i, labels.index(side))
            out.append(APPLIED)
        if relabelled:
            self._mark_dirty(np.arange(len(self.keys)))
        return out

    def _register_many(self, keys: Sequence[str]) -> np.ndarray:
        """Indices of ``keys``, registering the unknown ones (as ``waiting``) in order."""
        start = len(self.keys)
        out = self.keys.add(keys)
        added = len(self.keys) - start
        if added:
            self.ledger.add_items(added)
            self.items.grow(added)
            self._mark_dirty(np.arange(start, len(self.keys)))
        return out

    def _pin(self, i: int, slot: int) -> None:
        led = self.ledger.items
        was = int(led["side"][i])
        led["pinned"][i] = True
        led["side"][i] = slot
        self.items["status"][i] = PLACED
        self._mark_dirty(np.array([i]))
        if was != UNPLACED and was != slot:
            self.items["rev"][i] += 1
            self.revisions += 1
            self.ledger.recompute(self.delta, self.se)
        if was == UNPLACED:
            released = self.ledger.release_pending()
            self.ledger.count(released, self.delta, self.se)
        if self.phase == "run":
            self.pool = np.append(self.pool, i)

    def _source_ids(self, names: Sequence[str]) -> np.ndarray:
        """The ids of the sources ``names``, registering the new ones (_check_answers
        found the ids already when every source was known)."""
        index = self.source_index
        for name in dict.fromkeys(names):  # new sources, in order of first appearance
            if name not in index:
                index[name] = len(self.source_names)
                self.source_names.append(name)
                self.delta = np.append(self.delta, 0.0)
                self.se = np.append(self.se, noise.SE_NEW)
                self.src_answers = np.append(self.src_answers, 0.0)
        return np.fromiter(map(index.__getitem__, names), dtype=np.int64, count=len(names))

    def add_answers(self, answers: Sequence[Answer], now_ms: int = 0) -> list[str]:
        """Count new answers; return "applied" or "duplicate" for each, in order."""
        answers = list(answers)
        for pos, ans in enumerate(answers):
            if type(ans) is not Answer:
                raise EngineInputError(f"answer {pos}: expected an Answer, got "
                                       f"{type(ans).__name__}")
        fresh = self.add_answer_columns(AnswerColumns.of(answers), now_ms)
        return [APPLIED if f else DUPLICATE for f in fresh.tolist()]

    def add_answer_columns(self, answers: AnswerColumns | KeyRowAnswers, now_ms: int = 0
                           ) -> np.ndarray:
        """:meth:`add_answers` on columns: a bool array, True where the answer was applied
        (False: a duplicate). Same checks, same all-or-nothing refusal. Answers with keys
        as byte rows take a quick check when each holds its question's keys as shown, and
        are read as text for the usual checks when not."""
        got = self.last_intake = None
        if isinstance(answers, KeyRowAnswers):
            got = self._check_key_rows(answers)
            if got is None:
                answers = answers.columns()
        if got is None:
            got = self._check_answers(answers)
        return self._apply_intake(got, now_ms)

    def add_answers_by_qid(self, qn: np.ndarray, same: np.ndarray, sources: list[str],
                           now_ms: int = 0) -> np.ndarray:
        """:meth:`add_answer_columns` of a batch whose checked form was ``by_qid`` (see
        :attr:`last_intake`), given by its qids, flags and sources alone: the same effect,
        bit for bit. For replaying the journal, where the batch was checked when it came."""
        return self._apply_intake(self._intake_by_qid(qn, same, sources), now_ms)

    def _apply_intake(self, got: Intake, now_ms: int) -> np.ndarray:
        self.now_ms = max(self.now_ms, int(now_ms))
        self.last_intake = got
        count = len(got.same)
        if not count:
            return np.zeros(0, dtype=bool)
        both = self._register_missing(got.keys, got.both, got.unknown)  # a's, then b's
        a, b = both[:count], both[count:]
        src = got.src if got.src is not None else self._source_ids(got.sources)
        got.src = src
        same = got.same
        fresh = self.seen.add_new(pair_keys(a, b, src))
        # A qid answered twice is a duplicate even from another source; a qid is closed
        # by its first answer even when that (pair, source) was heard before.
        with_q, qn = got.with_q, got.qn
        if len(with_q):
            again = self.q["state"][qn] == Q_ANSWERED
            if not strictly_increasing(qn):  # a qid named twice: later answers are repeats
                again |= ~first_occurrence(qn)
            if np.count_nonzero(again):
                fresh[with_q[again]] = False
                qn = qn[~again]
            self._close_questions(qn, Q_ANSWERED)
        applied = int(np.count_nonzero(fresh))
        self.duplicates += count - applied
        if not applied:
            return fresh
        if applied < count:
            a, b, src, same = a[fresh], b[fresh], src[fresh], same[fresh]
            both = np.concatenate([a, b])
        self.spend += applied
        self._touch(both)
        self._nudge(both)
        if self.phase == "boot":
            self._mark_block_answers(a, b)
        rows = self.ledger.append_answers(a, b, src, same)
        targets = self.ledger.count(rows, self.delta, self.se)
        # only the items whose evidence moved have a new record (not a placed partner,
        # nor the two sides of an answer held until one of them is placed)
        self._mark_dirty(targets)
        if self.phase == "run":
            if self._counted() >= max(REFIT_MIN, self.counted_at_fit * (1 + REFIT_GROWTH)):
                self._refit(current=True)
                # the wave of records this may change waits among those left over
                self._marking_later = True
                try:
                    self._decide(np.arange(len(self.keys)), ordered=True)
                finally:
                    self._marking_later = False
            else:
                self._decide(targets)
        return fresh

    def _counted(self) -> int:
        return self.ledger.n_answers

    def _mark_dirty(self, idx: np.ndarray) -> None:
        """Items whose record must be published again (by take_update_columns)."""
        self.items["dirty"][idx] = True
        idx = np.asarray(idx, dtype=np.int64)
        (self._later if self._marking_later else self._dirty_marks).append(idx)
        self._dirty_count += len(idx)
        if self._dirty_count > max(len(self.keys), self.dirty_marks_floor):
            # nobody took the updates for a while (tools, benchmarks): the marks are
            # folded into the flags' own list, so they never outgrow the items
            self._reset_dirty_marks()

    def _reset_dirty_marks(self) -> None:
        """The marks folded into sets when they grew large (nobody took the updates for a
        while): what is left over stays so, the rest are the flags that remain."""
        left = self.left_over()
        self._later = [left] if len(left) else []
        self._backlog = np.zeros(0, dtype=np.int64)
        self._mark_flagged_but(left)

    def left_over(self) -> np.ndarray:
        """The records left over for later takes (sorted item numbers), for a snapshot."""
        if not self._later:
            return self._backlog
        return uniq(np.concatenate([self._backlog, *self._later]))

    def _restore_dirty(self, left: np.ndarray | None) -> None:
        """After a restore: the flagged records, those in ``left`` left over (a snapshot
        without it, written before there were any, holds none)."""
        self._backlog = np.zeros(0, dtype=np.int64) if left is None else left
        self._later = []
        self._mark_flagged_but(self._backlog)

    def _mark_flagged_but(self, left: np.ndarray) -> None:
        """The marks: every flagged item that is not left over (``left``, sorted)."""
        flagged = self.items.view("dirty").nonzero()[0].astype(np.int64)
        fresh = flagged[~np.isin(flagged, left, assume_unique=True)] if len(left) else flagged
        self._dirty_marks, self._dirty_count = [fresh], len(flagged)

    def _touch(self, idx: np.ndarray) -> None:
        """Waiting items that are asked about, or answered, are asking now."""
        st = self.items["status"]
        waiting = idx[st[idx] == WAITING]
        if len(waiting):
            st[waiting] = ASKING
            self._mark_dirty(waiting)

    def _close_questions(self, qn: np.ndarray, state: int) -> None:
        q = self.q
        opened = qn[q["state"][qn] == Q_OPEN]
        self.outstanding -= len(opened)
        why = q["why"][opened]
        place = q["target"][opened[why == PLACE]]  # only placement questions hold a slot
        np.subtract.at(self.items["inflight"], place, ONE_I32)
        self._nudge(place)
        if state == Q_EXPIRED:
            seed = opened[why == SEED]  # a block pair not answered in time is asked again
            if len(seed):
                self._block_mark(q["target"][seed], q["partner"][seed], 0)
        q["state"][qn] = state

    # -- snapshot ---------------------------------------------------------------
    def snapshot(self) -> bytes:
        """Everything needed to continue exactly where this engine stands."""
        return snapshot.dump(self)

    @classmethod
    def restore(cls, data: bytes) -> Engine:
        return snapshot.load(cls, data)

    def nbytes(self) -> int:
        """Approximate memory held by the arrays and the key store (not the key cache)."""
        return (self.ledger.nbytes() + self.items.nbytes() + self.q.nbytes()
                + self.keys.nbytes() + self.seen.nbytes
                + self.pool.nbytes + self.block_state.nbytes)


