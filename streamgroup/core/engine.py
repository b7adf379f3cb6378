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
- ``record(key) -> Record | None``; ``stats() -> dict``; ``sources() -> list[dict]``;
  ``done() -> bool``.
- ``snapshot() -> bytes`` and ``Engine.restore(data) -> Engine``: a restored engine behaves
  exactly like the original (same future questions, qids and decisions).
"""

from __future__ import annotations

import math
import zlib
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from typing import Any

import msgpack
import numpy as np

from ..errors import EngineInputError
from ..keys import (
    STATUS_ASKING,
    STATUS_PLACED,
    STATUS_UNRESOLVED,
    STATUS_WAITING,
    WHY_CHECK,
    WHY_PLACE,
    WHY_SEED,
)
from . import bootstrap, noise, planner, validate
from .columns import Columns, uniq
from .evidence import decision_error
from .keyindex import KeyIndex
from .ledger import UNPLACED, Ledger
from .pairset import MAX_ITEMS, MAX_SOURCES, PairSet, pair_keys
from .sprt import threshold, weight
from .types import APPLIED, DUPLICATE, Answer, EngineConfig, Question, Record

SNAPSHOT_VERSION = 1
SNAPSHOT_MAGIC = b"SGZ1"  # zlib-compressed msgpack follows
STATUS_NAMES = (STATUS_WAITING, STATUS_ASKING, STATUS_PLACED, STATUS_UNRESOLVED)
WAITING, ASKING, PLACED, UNRESOLVED = range(4)
WHY_NAMES = (WHY_SEED, WHY_PLACE, WHY_CHECK)
SEED, PLACE, CHECK = range(3)
Q_OPEN, Q_ANSWERED, Q_EXPIRED = range(3)

ANCHOR_FACTOR = 0.01  # an item joins the reference pool when its error is <= alpha * this
BLOCK_START = 16  # first bootstrap block size
BLOCK_MAX = 800  # the block stops growing here
MIN_ANCHORS = 8  # reference members needed before placing the other items
REFIT_GROWTH = 0.20  # re-learn the sources when counted answers grew by this fraction
REFIT_MIN = 200

_ITEM_FIELDS: dict[str, tuple[Any, Any]] = {
    "status": (np.int8, WAITING),
    "inflight": (np.int32, 0),
    "asked": (np.int32, 0),
    "rev": (np.int32, 0),
    "first_ms": (np.int64, -1),
    "dirty": (np.bool_, False),
    "shown_side": (np.int8, UNPLACED),  # side and status last handed out by take_changes
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


@dataclass(slots=True)
class _Intake:
    """One checked batch of answers, as arrays (indices -1 for keys not registered yet)."""

    a_keys: list[str]
    b_keys: list[str]
    ia: np.ndarray
    ib: np.ndarray
    sources: list[str]
    same: np.ndarray
    with_q: np.ndarray  # positions of answers that name a qid
    qn: np.ndarray  # those qids as numbers


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


class Engine:
    """Evidence, decisions, noise learning and planning for one two-group deployment."""

    def __init__(self, config: EngineConfig | None = None) -> None:
        self.config = config or EngineConfig()
        _check_config(self.config)
        # the least evidence that can end a walk: the randomised boundary's lower edge
        self._salt = int(self.config.seed) * 1_000_003  # every planning coin depends on the seed
        self.boundary = threshold(min(0.499, self.config.alpha * (1 + self.config.alpha_slack)))
        self.ledger = Ledger()
        self.items = Columns(_ITEM_FIELDS)
        self.q = Columns(_Q_FIELDS, 64)
        self.q_low = 0  # every qid below this is answered or expired
        self.keys = KeyIndex()
        self.source_names: list[str] = []
        self.source_index: dict[str, int] = {}
        self.delta = np.zeros(0)
        self.se = np.zeros(0)
        self.src_answers = np.zeros(0)
        self.pooled = 0.0
        self.pooled_se = noise.SE_NEW
        self.labels: list[str | None] = [None, None]
        self.seen = PairSet()
        self.pool = np.zeros(0, dtype=np.int64)  # reference members, in joining order
        self.pool_base = 0
        self.shared = 1.0  # chance two answers share a source (Herfindahl index of volume)
        # planning work lists: items to look at in the next round
        self.nudged: list[np.ndarray] = []
        self.carry = np.zeros(0, dtype=np.int64)
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
        led = self.ledger.items
        side = led["side"][idx]
        llr = led["llr"][idx]
        shown = np.where(side == 1, llr, np.where(side == 0, -llr, np.abs(llr))).round(6)
        names = [self.label(0), self.label(1), None]
        return [
            Record(k, names[s], STATUS_NAMES[st], v, c, r, p)
            for k, s, st, v, c, r, p in zip(
                self.keys.keys_of(idx), side.tolist(), self.items["status"][idx].tolist(),
                shown.tolist(), led["count"][idx].tolist(), self.items["rev"][idx].tolist(),
                led["pinned"][idx].tolist(), strict=True)
        ]

    def take_changes(self) -> list[Record]:
        """Records changed since the last call (each item once, in item order)."""
        return self.take_updates()[0]

    def take_updates(self) -> tuple[list[Record], list[Record]]:
        """(records changed since the last call, those among them whose side or status
        changed: the decisions to publish; an item first seen as ``waiting`` has none)."""
        dirty = np.nonzero(self.items.view("dirty"))[0]
        out = self._records(dirty)
        it = self.items
        side = self.ledger.items["side"][dirty]
        status = it["status"][dirty]
        seen = it["shown_status"][dirty]
        moved = (side != it["shown_side"][dirty]) | (status != seen)
        moved &= ~((seen < 0) & (status == WAITING))
        decided = [out[k] for k in np.nonzero(moved)[0].tolist()]
        self.items["dirty"][dirty] = False
        self.items["shown_side"][dirty] = self.ledger.items["side"][dirty]
        self.items["shown_status"][dirty] = self.items["status"][dirty]
        return out, decided

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
        counts = np.bincount(self.ledger.answer("src"), minlength=len(self.source_names))
        return [
            {"source": name, "answers": int(counts[j]), "delta": round(float(self.delta[j]), 6),
             "se": round(float(self.se[j]), 6)}
            for j, name in enumerate(self.source_names)
        ]

    # -- validation ---------------------------------------------------------------
    def validate_item(self, key: Any, side: Any = None) -> str | None:
        err = validate.item_key(key)
        if err or side is None:
            return err
        err = validate.side_label(side)
        if err:
            return err
        if self._slot_for(side, self.labels) is None:
            bound = ", ".join(str(x) for x in self.labels if x is not None)
            return f"side label {side!r} would be a third group (bound: {bound})"
        i = self.keys.get(key)
        if i is not None and self.ledger.items["pinned"][i]:
            have = self.label(int(self.ledger.items["side"][i]))
            if have != side:
                return f"item {key!r} is already pinned to side {have!r}"
        return None

    def _register_missing(self, keys: list[str], idx: np.ndarray) -> np.ndarray:
        missing = idx < 0
        if not missing.any():
            return idx
        out = idx.copy()
        pos = np.nonzero(missing)[0]
        out[pos] = self._register_many([keys[k] for k in pos.tolist()])
        return out

    def validate_answer(self, ans: Any) -> str | None:
        try:
            self._check_answers([ans])
        except EngineInputError as exc:
            return str(exc).split(": ", 1)[1]
        return None

    def _check_answers(self, answers: Sequence[Any]) -> _Intake:
        """Raise EngineInputError at the first bad answer, else return the batch as arrays.

        Keys already registered were checked when they arrived, so the common case costs
        a few vectorised operations per batch rather than string checks per answer.
        """
        count = len(answers)
        if set(map(type, answers)) - {Answer}:
            for pos, ans in enumerate(answers):
                if type(ans) is not Answer:
                    raise EngineInputError(f"answer {pos}: expected an Answer, got "
                                           f"{type(ans).__name__}")
        a_keys = [x.a for x in answers]
        b_keys = [x.b for x in answers]
        ia = self.keys.lookup(a_keys)
        ib = self.keys.lookup(b_keys)
        bad: dict[int, str] = {}
        for pos in np.nonzero((ia < 0) | (ib < 0))[0].tolist():
            err = ((ia[pos] < 0 and validate.item_key(a_keys[pos], "a"))
                   or (ib[pos] < 0 and validate.item_key(b_keys[pos], "b")))
            if not err and a_keys[pos] == b_keys[pos]:
                err = "a and b are the same item"
            if err:
                bad[pos] = err
        for pos in np.nonzero((ia == ib) & (ia >= 0))[0].tolist():
            bad.setdefault(pos, "a and b are the same item")
        flags = [x.same for x in answers]
        if set(map(type, flags)) - {bool}:
            for pos, f in enumerate(flags):
                err = validate.same_flag(f)
                if err:
                    bad.setdefault(pos, err)
        names = [x.source for x in answers]
        sources = self.source_index
        new_sources = set(names) - sources.keys()
        if new_sources:
            for pos, n in enumerate(names):
                if n in new_sources:
                    err = validate.source_id(n)
                    if not err and len(sources) + len(new_sources) > MAX_SOURCES:
                        err = f"too many sources (limit {MAX_SOURCES})"
                    if err:
                        bad.setdefault(pos, err)
        qids = [x.qid for x in answers]
        with_q = [pos for pos, q in enumerate(qids) if q is not None]
        qn = np.full(len(with_q), -1, dtype=np.int64)
        if with_q:
            texts = [qids[pos] for pos in with_q]
            if (set(map(type, texts)) == {str} and all(map(str.isdigit, texts))
                    and all(map(str.isascii, texts)) and max(map(len, texts)) < 19):
                qn = np.array(texts).astype(np.int64)
            else:
                for k, q in enumerate(texts):
                    err = validate.qid(q)
                    if err:
                        bad.setdefault(with_q[k], err)
                    elif q.isascii() and len(q) < 19:
                        qn[k] = int(q)
        if with_q:
            wq = np.asarray(with_q, dtype=np.int64)
            known = qn >= 0
            issued = known & (qn < self.q.n)
            for k in np.nonzero(~issued)[0].tolist():
                bad.setdefault(with_q[k], f"qid {qids[with_q[k]]!r} is not one this "
                                          "worker issued")
            safe = np.where(issued, qn, 0)
            t, p = self.q["target"][safe], self.q["partner"][safe]
            i, j = ia[wq], ib[wq]
            match = ((t == i) & (p == j)) | ((t == j) & (p == i))
            for k in np.nonzero(issued & ~match)[0].tolist():
                bad.setdefault(with_q[k], f"qid {qids[with_q[k]]!r} was asked "
                                          "about another pair")
        if bad:
            pos = min(bad)
            raise EngineInputError(f"answer {pos}: {bad[pos]}")
        same = np.fromiter((bool(f) for f in flags), dtype=bool, count=count)
        return _Intake(a_keys, b_keys, ia, ib, names, same, np.asarray(with_q, dtype=np.int64),
                       qn)

    @staticmethod
    def _slot_for(side: str, labels: list[str | None]) -> int | None:
        if side in labels:
            return labels.index(side)
        if side in ("0", "1") and labels[int(side)] is None:
            return int(side)
        for k in (0, 1):
            if labels[k] is None and str(k) not in labels:
                return k
        return None

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
            self.items["dirty"][: len(self.keys)] = True
        return out

    def _register_many(self, keys: Sequence[str]) -> np.ndarray:
        """Indices of ``keys``, registering the unknown ones (as ``waiting``) in order."""
        start = len(self.keys)
        out = self.keys.add(keys)
        added = len(self.keys) - start
        if added:
            self.ledger.add_items(added)
            self.items.grow(added)
            self.items["dirty"][start:] = True
        return out

    def _pin(self, i: int, slot: int) -> None:
        led = self.ledger.items
        was = int(led["side"][i])
        led["pinned"][i] = True
        led["side"][i] = slot
        self.items["status"][i] = PLACED
        self.items["dirty"][i] = True
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
        index = self.source_index
        if len(set(names)) == 1 and names[0] in index:
            return np.full(len(names), index[names[0]], dtype=np.int64)
        out = np.empty(len(names), dtype=np.int64)
        for k, name in enumerate(names):
            j = index.get(name)
            if j is None:
                j = len(self.source_names)
                self.source_names.append(name)
                self.source_index[name] = j
                self.delta = np.append(self.delta, 0.0)
                self.se = np.append(self.se, noise.SE_NEW)
                self.src_answers = np.append(self.src_answers, 0.0)
            out[k] = j
        return out

    def add_answers(self, answers: Sequence[Answer], now_ms: int = 0) -> list[str]:
        """Count new answers; return "applied" or "duplicate" for each, in order."""
        answers = list(answers)
        got = self._check_answers(answers)
        self.now_ms = max(self.now_ms, int(now_ms))
        if not answers:
            return []
        a = self._register_missing(got.a_keys, got.ia)
        b = self._register_missing(got.b_keys, got.ib)
        src = self._source_ids(got.sources)
        same = got.same
        fresh = self.seen.add_new(pair_keys(a, b, src))
        # A qid answered twice is a duplicate even from another source; a qid is closed
        # by its first answer even when that (pair, source) was heard before.
        with_q, qn = got.with_q, got.qn
        if len(with_q):
            first = np.zeros(len(qn), dtype=bool)
            first[np.unique(qn, return_index=True)[1]] = True
            again = (self.q["state"][qn] == Q_ANSWERED) | ~first
            fresh[with_q[again]] = False
            self._close_questions(qn[~again], Q_ANSWERED)
        out = [APPLIED if f else DUPLICATE for f in fresh.tolist()]
        self.duplicates += int((~fresh).sum())
        if not fresh.any():
            return out
        a, b, src, same = a[fresh], b[fresh], src[fresh], same[fresh]
        self.spend += len(a)
        self._touch(np.concatenate([a, b]))
        self._nudge(np.concatenate([a, b]))
        if self.phase == "boot":
            self._mark_block_answers(a, b)
        idx = self.ledger.append_answers(a, b, src, same)
        targets = self.ledger.count(idx, self.delta, self.se)
        if self.phase == "run":
            if self._counted() >= max(REFIT_MIN, self.counted_at_fit * (1 + REFIT_GROWTH)):
                self._refit()
                self._decide(np.arange(len(self.keys)))
            else:
                self._decide(targets)
        return out

    def _counted(self) -> int:
        return self.ledger.n_answers

    def _touch(self, idx: np.ndarray) -> None:
        st = self.items["status"]
        waiting = idx[st[idx] == WAITING]
        st[waiting] = ASKING
        self.items["dirty"][idx] = True

    def _close_questions(self, qn: np.ndarray, state: int) -> None:
        q = self.q
        was_open = q["state"][qn] == Q_OPEN
        opened = qn[was_open]
        self.outstanding -= len(opened)
        why = q["why"][opened]
        place = opened[why == PLACE]  # only placement questions hold an item's slot
        np.subtract.at(self.items["inflight"], q["target"][place], 1)
        self._nudge(q["target"][place].astype(np.int64))
        if state == Q_EXPIRED:
            seed = opened[why == SEED]  # a block pair not answered in time is asked again
            if len(seed):
                self._block_mark(q["target"][seed], q["partner"][seed], 0)
        q["state"][qn] = state

    # -- decisions --------------------------------------------------------------
    def _refit(self, cold: bool = False) -> None:
        fit = noise.fit(self.ledger, self.delta, self.se, cold=cold)
        self.delta, self.se, self.src_answers = fit.delta, fit.se, fit.answers
        self.pooled, self.pooled_se = fit.pooled, fit.pooled_se
        self.counted_at_fit = self._counted()
        share = np.bincount(self.ledger.answer("src"), minlength=len(self.delta)).astype(float)
        share /= max(share.sum(), 1.0)
        self.shared = float((share * share).sum())

    def _decide(self, touched: np.ndarray) -> None:
        """Commit, revise or give up on the touched items, following every consequence."""
        led = self.ledger.items
        alpha = self.config.alpha
        todo = uniq(touched)
        for _ in range(64):
            if len(todo) == 0:
                return
            todo = todo[~led["pinned"][todo]]
            llr = led["llr"][todo]
            spread = self.ledger.spread(todo, self.shared)
            err = decision_error(llr, spread)
            lean = (llr > 0).astype(np.int8)
            side = led["side"][todo]
            ok = err <= alpha
            commit = self._may_commit(todo, err, spread, side == UNPLACED)
            newly = todo[commit]
            flips = todo[ok & (side != UNPLACED) & (lean != side)]
            if len(newly):
                led["side"][newly] = lean[commit]
                self._committed(newly)
            ok |= commit
            if len(flips):
                led["side"][flips] = 1 - led["side"][flips]
                self.items["rev"][flips] += 1
                self.revisions += len(flips)
                self.items["dirty"][flips] = True
            strong = todo[err <= alpha * ANCHOR_FACTOR]
            if len(strong):
                self._grow_pool(strong)
            self._give_up(todo[~ok])
            if len(flips):
                self.ledger.recompute(self.delta, self.se)
                todo = np.arange(len(self.keys))
            elif len(newly):
                released = self.ledger.release_pending()
                todo = self.ledger.count(released, self.delta, self.se)
                todo = uniq(todo)
            else:
                return

    def _may_commit(self, idx: np.ndarray, err: np.ndarray, spread: np.ndarray,
                    open_: np.ndarray) -> np.ndarray:
        """Which open items commit now: those with error <= alpha, and, at random, those
        just above it.

        The walk moves in whole steps, so the error at the first step past the boundary can
        land a hair above alpha (an estimate of the bias a hair low), and the next step far
        below it. An item within alpha * (1 + slack) commits with the probability pi that
        makes its expected error alpha: pi * err + (1 - pi) * err_next = alpha, where
        err_next is its error one agreeing answer later (a randomised boundary, as in a
        randomised test). The coin is a hash of the item and its answer count, so a replay
        decides the same way.
        """
        alpha = self.config.alpha
        strict = open_ & (err <= alpha)
        loose = open_ & ~strict & (err <= alpha * (1.0 + self.config.alpha_slack))
        if not loose.any():
            return strict
        llr = self.ledger.items["llr"][idx[loose]]
        nxt = decision_error(np.abs(llr) + self._best_step(), spread[loose])
        e = err[loose]
        pi = np.clip((alpha - nxt) / np.maximum(e - nxt, 1e-300), 0.0, 1.0)
        count = self.ledger.items["count"][idx[loose]].astype(np.uint64)
        coin = planner.uniform(idx[loose].astype(np.uint64) * np.uint64(1 << 20) + count,
                              29 + self._salt)
        out = strict.copy()
        out[np.nonzero(loose)[0][coin < pi]] = True
        return out

    def _committed(self, idx: np.ndarray) -> None:
        st = self.items["status"]
        st[idx] = PLACED
        self.items["dirty"][idx] = True
        first = self.items["first_ms"][idx]
        asked = first[first >= 0]
        self.latencies.extend(((self.now_ms - asked) / 1000.0).tolist())

    def _give_up(self, idx: np.ndarray) -> None:
        if len(idx) == 0:
            return
        cnt = self.ledger.items["count"][idx]
        st = self.items["status"][idx]
        stuck = idx[(cnt >= self.config.item_ceiling) & (st != PLACED) & (st != UNRESOLVED)]
        if len(stuck):
            self.items["status"][stuck] = UNRESOLVED
            self.items["dirty"][stuck] = True

    def _grow_pool(self, idx: np.ndarray) -> None:
        if self.phase != "run":
            return
        idx = idx[self.ledger.items["side"][idx] != UNPLACED]
        known = np.isin(idx, self.pool)
        if (~known).any():
            self.pool = np.concatenate([self.pool, idx[~known]])

    # -- bootstrap --------------------------------------------------------------
    def _block_mark(self, a: Any, b: Any, value: int) -> None:
        pos = self.items["block"]
        pa, pb = pos[a], pos[b]
        ok = (pa >= 0) & (pb >= 0)
        if np.ndim(ok) == 0:
            if ok and self.block_state[pa, pb] != 2:
                self.block_state[pa, pb] = self.block_state[pb, pa] = value
            return
        pa, pb = pa[ok], pb[ok]
        self.block_state[pa, pb] = value
        self.block_state[pb, pa] = value

    def _mark_block_answers(self, a: np.ndarray, b: np.ndarray) -> None:
        self._block_mark(a, b, 2)

    def _extend_block(self, size: int) -> None:
        """Grow the block to ``size`` members: pinned items first, then in arrival order."""
        pos = self.items["block"]
        n = len(self.keys)
        have = len(self.block)
        if size <= have:
            return
        order = np.arange(n)
        outside = order[pos[:n] < 0]
        pinned = self.ledger.items["pinned"][outside]
        chosen = np.concatenate([outside[pinned], outside[~pinned]])[: size - have]
        self.block = np.concatenate([self.block, chosen])
        pos[chosen] = np.arange(have, have + len(chosen))
        m = len(self.block)
        state = np.zeros((m, m), dtype=np.int8)
        state[:have, :have] = self.block_state
        np.fill_diagonal(state, 2)
        # Pairs answered before they were in the block still count as answered.
        la, lb = self.ledger.answer("a"), self.ledger.answer("b")
        both = (pos[la] >= 0) & (pos[lb] >= 0)
        state[pos[la[both]], pos[lb[both]]] = 2
        state[pos[lb[both]], pos[la[both]]] = 2
        self.block_state = state

    def _plan_block(self, now_ms: int, room: int) -> list[Question]:
        n = len(self.keys)
        if len(self.block) == 0:
            if n < 2:
                return []
            pinned = int(self.ledger.item("pinned").sum())
            self._extend_block(min(n, max(BLOCK_START, min(pinned, BLOCK_MAX))))
        elif len(self.block) < BLOCK_START and n > len(self.block):
            self._extend_block(min(n, BLOCK_START))
        st = self.block_state
        if (st == 2).all():
            self._solve_block()
            return []
        i, j = np.nonzero(np.triu(st == 0, 1))
        if len(i) == 0 or room <= 0:
            return []
        i, j = i[:room], j[:room]
        st[i, j] = st[j, i] = 1
        return self._issue(self.block[i], self.block[j], SEED, now_ms)

    def _solve_block(self) -> None:
        led = self.ledger.items
        pos = self.items["block"]
        members = self.block
        la, lb = self.ledger.answer("a"), self.ledger.answer("b")
        inside = (pos[la] >= 0) & (pos[lb] >= 0)
        x = self.ledger.answer("same")[inside].astype(np.float64)
        sides = bootstrap.block_sides(len(members), pos[la[inside]], pos[lb[inside]], x)
        pinned = led["pinned"][members]
        if pinned.any() and (sides[pinned] != led["side"][members[pinned]]).mean() > 0.5:
            sides = 1 - sides
        free = members[~pinned]
        led["side"][free] = sides[~pinned]
        self.ledger.redirect_all()
        self._refit(cold=True)
        strong = self._admit(members, pinned)
        can_grow = len(members) < min(len(self.keys), BLOCK_MAX)
        if strong.sum() < MIN_ANCHORS and can_grow:
            led["side"][free] = UNPLACED
            self.ledger.redirect_all()
            self.ledger.recompute(self.delta, self.se)
            self._extend_block(bootstrap.grow_size(len(members), len(self.keys)))
            return
        if not pinned.any() and strong.any():
            first = members[np.argmax(strong)]
            if led["side"][first] == 1:  # side 0 is the side of the first reference item
                led["side"][free] = 1 - led["side"][free]
        weak = members[~strong]
        led["side"][weak] = UNPLACED
        self.ledger.redirect_all()
        self._refit()
        self.pool = members[strong].astype(np.int64)
        self.pool_base = len(self.pool)
        self._committed(members[strong & ~pinned])
        self.items["dirty"][members] = True
        self.phase = "run"
        self.cursor = 0  # every item is looked at once more
        if len(self.pool) == 0:  # nothing could be learned: a person must look
            st = self.items.view("status")
            st[(st != PLACED)] = UNRESOLVED
            self.items["dirty"][: len(self.keys)] = True
            return
        self._decide(np.arange(len(self.keys)))

    def _admit(self, members: np.ndarray, pinned: np.ndarray) -> np.ndarray:
        """Members whose evidence from the other admitted members alone is strong.

        Dropping a weak member removes its answers from the others' evidence, so the
        check repeats until the admitted set is stable: every reference member then
        stands on answers among reference members only.
        """
        led = self.ledger.items
        keep = np.ones(len(members), dtype=bool)
        sides = led["side"][members].copy()
        for _ in range(len(members)):
            err = decision_error(led["llr"][members], self.ledger.spread(members, self.shared))
            ok = pinned | (keep & (err <= self.config.alpha * ANCHOR_FACTOR))
            if (ok == keep).all():
                break
            keep = ok
            led["side"][members] = np.where(keep, sides, UNPLACED)
            self.ledger.redirect_all()
            self.ledger.recompute(self.delta, self.se)
        led["side"][members] = sides
        return keep

    # -- planning ---------------------------------------------------------------
    def plan(self, now_ms: int) -> list[Question]:
        """The questions to send now, within every cap."""
        self.now_ms = max(self.now_ms, int(now_ms))
        now = self.now_ms
        self._expire(now)
        cfg = self.config
        room = cfg.max_outstanding - self.outstanding
        if cfg.budget:
            room = min(room, cfg.budget - sum(self.issued))
        if room <= 0:
            return []
        if self.phase == "boot":
            out = self._plan_block(now, room)
            if self.phase == "boot":
                return out
            room -= len(out)
        else:
            out = []
        return out + self._plan_place(now, room)

    def _best_step(self) -> float:
        seen = self.src_answers > 0
        if not seen.any():
            return abs(float(weight(self.pooled)))
        return float(np.max(np.abs(weight(self.delta[seen]))))

    def _plan_place(self, now_ms: int, room: int) -> list[Question]:
        """Placement questions for items that were nudged, carried over, or never asked.

        Only those items are looked at (not every item), so a round costs time in
        proportion to the answers that arrived, not to the size of the deployment.
        """
        if room <= 0 or len(self.pool) == 0:
            return []
        cfg = self.config
        parts = [self.carry, *self.nudged]
        self.nudged = []
        cand = uniq(np.concatenate(parts)) if parts else np.zeros(0, dtype=np.int64)
        targets, self.carry = self._serve(cand, room)
        n = len(self.keys)
        while len(targets) < room and self.cursor < n:
            end = min(n, self.cursor + max(4 * (room - len(targets)), 1024))
            more, rest = self._serve(np.arange(self.cursor, end), room - len(targets))
            self.cursor = end
            targets = np.concatenate([targets, more])
            self.carry = np.concatenate([self.carry, rest])
        if len(targets) == 0:
            return []
        # distinct partners for the slots one item gets in one round
        order = np.argsort(targets, kind="stable")
        sorted_t = targets[order]
        first = np.r_[0, np.nonzero(np.diff(sorted_t))[0] + 1]
        offset = np.empty(len(targets), dtype=np.int64)
        offset[order] = np.arange(len(targets)) - np.repeat(first, np.diff(np.r_[first,
                                                                              len(targets)]))
        k = self.items["asked"][targets].astype(np.uint64) + offset.astype(np.uint64)
        partners = self._partners(targets, k)
        out = self._issue(targets, partners, PLACE, now_ms)
        checks = planner.check_count(len(out), cfg.check_rate, self.q.n)
        checks = min(checks, room - len(out))
        if checks > 0 and len(self.pool) >= 2:
            salt = np.arange(self.q.n, self.q.n + checks, dtype=np.uint64) ^ planner.mix(
                self._salt)
            ia = (planner.mix(salt ^ np.uint64(5)) % np.uint64(len(self.pool))).astype(np.int64)
            ib = (planner.mix(salt ^ np.uint64(9)) % np.uint64(len(self.pool) - 1)).astype(
                np.int64)
            ib = ib + (ib >= ia)
            out += self._issue(self.pool[ia], self.pool[ib], CHECK, now_ms)
        return out

    def _serve(self, cand: np.ndarray, room: int) -> tuple[np.ndarray, np.ndarray]:
        """(one target per question to ask, candidates left with room when ``room`` ran out)."""
        empty = np.zeros(0, dtype=np.int64)
        if len(cand) == 0 or room <= 0:
            return empty, cand.astype(np.int64)
        cfg = self.config
        led = self.ledger.items
        st = self.items["status"][cand]
        cand = cand[((st == WAITING) | (st == ASKING)) & (led["side"][cand] == UNPLACED)]
        need = planner.answers_still_needed(led["llr"][cand], self.boundary, self._best_step())
        each = planner.slots(cand, need, self.items["inflight"][cand], led["count"][cand],
                             cfg.inflight, cfg.item_ceiling)
        cand, each = cand[each > 0], each[each > 0]
        if len(cand) == 0:
            return empty, empty
        ends = np.cumsum(each)
        served = int(np.searchsorted(ends, room, side="right"))
        targets = np.repeat(cand, each)[:room]
        return targets.astype(np.int64), cand[served:].astype(np.int64)

    def _nudge(self, idx: np.ndarray) -> None:
        if len(idx):
            self.nudged.append(np.asarray(idx, dtype=np.int64))

    def _active_pool(self) -> int:
        """Pool members in rotation: it grows only by doublings, so that each item's
        rotation stays stable and rarely meets the same member twice."""
        base = self.pool_base or len(self.pool)
        size = base
        while size * 2 <= len(self.pool):
            size *= 2
        return size

    def _partners(self, targets: np.ndarray, k: np.ndarray) -> np.ndarray:
        """The k-th partner of each target: the reference pool in a per-item rotation, then
        (once an item has met every member) any placed item, so pairs do not repeat."""
        h = planner.mix(targets.astype(np.uint64) ^ planner.mix(self._salt))
        size = np.uint64(self._active_pool())
        out = self.pool[((h + k) % size).astype(np.int64)]
        beyond = k >= size
        if beyond.any():
            placed = np.nonzero(self.ledger.item("side") != UNPLACED)[0]
            pick = (planner.mix(h[beyond] ^ k[beyond]) % np.uint64(len(placed))).astype(np.int64)
            out[beyond] = placed[pick]
        return out

    def _issue(self, targets: np.ndarray, partners: np.ndarray, why: int,
               now_ms: int) -> list[Question]:
        count = len(targets)
        if count == 0:
            return []
        qids = self.q.grow(count)
        q = self.q
        q["target"][qids] = targets
        q["partner"][qids] = partners
        q["ts"][qids] = now_ms
        q["state"][qids] = Q_OPEN
        q["why"][qids] = why
        self.outstanding += count
        self.issued[why] += count
        it = self.items
        if why == PLACE:
            np.add.at(it["inflight"], targets, 1)
            np.add.at(it["asked"], targets, 1)
        for side in (targets, partners) if why != CHECK else ():
            fresh = side[it["first_ms"][side] < 0]
            it["first_ms"][fresh] = now_ms
        self._touch(np.asarray(targets, dtype=np.int64))
        swap = planner.uniform(qids.astype(np.uint64), 3 + self._salt) < 0.5
        first = np.where(swap, partners, targets)
        second = np.where(swap, targets, partners)
        name = WHY_NAMES[why]
        return [
            Question(str(qid), a, b, name, now_ms)
            for qid, a, b in zip(qids.tolist(), self.keys.keys_of(first),
                                 self.keys.keys_of(second), strict=True)
        ]

    def _expire(self, now_ms: int) -> None:
        q = self.q
        lo, n = self.q_low, q.n
        if lo >= n:
            return
        state = q["state"][lo:n]
        late = np.nonzero((state == Q_OPEN)
                          & (q["ts"][lo:n] + self.config.question_timeout_ms <= now_ms))[0]
        self._close_questions(lo + late, Q_EXPIRED)
        open_ = np.nonzero(q["state"][lo:n] == Q_OPEN)[0]
        self.q_low = lo + (int(open_[0]) if len(open_) else n - lo)

    # -- snapshot ---------------------------------------------------------------
    def snapshot(self) -> bytes:
        """Everything needed to continue exactly where this engine stands."""
        c = self.config
        state = {
            "v": SNAPSHOT_VERSION,
            "config": [c.alpha, c.inflight, c.max_outstanding, c.budget, c.item_ceiling,
                       c.question_timeout_ms, c.check_rate, c.seed, c.alpha_slack],
            "keys": self.keys.to_state(),
            "sources": self.source_names,
            "delta": self.delta.tobytes(),
            "se": self.se.tobytes(),
            "src_answers": self.src_answers.tobytes(),
            "pooled": [self.pooled, self.pooled_se, self.shared],
            "labels": self.labels,
            "seen": self.seen.to_bytes(),
            "pool": self.pool.astype(np.int64).tobytes(),
            "phase": self.phase,
            "block": self.block.astype(np.int64).tobytes(),
            "block_state": self.block_state.tobytes(),
            "counters": [self.counted_at_fit, *self.issued, self.spend, self.duplicates,
                         self.revisions, self.outstanding, self.now_ms, self.q_low, self.pool_base],
            "ledger": self.ledger.to_state(),
            "items": self.items.to_state(),
            "q": self.q.to_state(),
            "work": [np.concatenate([self.carry, *self.nudged]).astype(np.int64).tobytes(),
                     self.cursor],
        }
        # The arrays are mostly small integers and zeros: zlib at its fastest level makes
        # the snapshot several times smaller, which is what Redis holds per item.
        return SNAPSHOT_MAGIC + zlib.compress(msgpack.packb(state, use_bin_type=True), 1)

    @classmethod
    def restore(cls, data: bytes) -> Engine:
        try:
            if data[: len(SNAPSHOT_MAGIC)] == SNAPSHOT_MAGIC:
                data = zlib.decompress(data[len(SNAPSHOT_MAGIC):])
            st = msgpack.unpackb(data, raw=False)
            if st.get("v") != SNAPSHOT_VERSION:
                raise EngineInputError(f"snapshot version {st.get('v')!r} is not supported")
            eng = cls(EngineConfig(*st["config"]))
            eng.keys = KeyIndex.from_state(st["keys"])
            eng.source_names = list(st["sources"])
            eng.source_index = {k: i for i, k in enumerate(eng.source_names)}
            eng.delta = np.frombuffer(st["delta"], dtype=np.float64).copy()
            eng.se = np.frombuffer(st["se"], dtype=np.float64).copy()
            eng.src_answers = np.frombuffer(st["src_answers"], dtype=np.float64).copy()
            eng.pooled, eng.pooled_se, eng.shared = st["pooled"]
            eng.labels = list(st["labels"])
            eng.seen = PairSet.from_bytes(st["seen"])
            eng.pool = np.frombuffer(st["pool"], dtype=np.int64).copy()
            eng.phase = st["phase"]
            eng.block = np.frombuffer(st["block"], dtype=np.int64).copy()
            m = len(eng.block)
            eng.block_state = np.frombuffer(st["block_state"], dtype=np.int8).copy().reshape(m, m)
            (eng.counted_at_fit, s0, s1, s2, eng.spend, eng.duplicates, eng.revisions,
             eng.outstanding, eng.now_ms, eng.q_low, eng.pool_base) = st["counters"]
            eng.issued = [s0, s1, s2]
            eng.ledger = Ledger.from_state(st["ledger"])
            eng.items.load_state(st["items"])
            eng.q.load_state(st["q"])
            carry, eng.cursor = st["work"]
            eng.carry = uniq(np.frombuffer(carry, dtype=np.int64))
        except EngineInputError:
            raise
        except (ValueError, KeyError, TypeError, zlib.error, msgpack.UnpackException) as exc:
            raise EngineInputError(f"snapshot is unreadable: {exc}") from None
        return eng

    def nbytes(self) -> int:
        """Approximate memory held by the numpy state (excludes the key strings)."""
        return (self.ledger.nbytes() + self.items.nbytes() + self.q.nbytes()
                + self.seen.sorted.nbytes + self.pool.nbytes + self.block_state.nbytes)

