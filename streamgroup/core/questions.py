"""Issuing questions inside the engine: who to ask about, within every cap."""

from __future__ import annotations

import numpy as np

from . import planner
from .codes import ASKING, CHECK, PLACE, Q_EXPIRED, Q_OPEN, UNRESOLVED, WHY_NAMES
from .columns import ONE_I32
from .ledger import UNPLACED
from .sprt import weight
from .types import Question, QuestionColumns


class QuestionsMixin:
    """Planning of questions (part of :class:`~streamgroup.core.engine.Engine`)."""

    _best_step_memo: tuple[np.ndarray, np.ndarray, float, float] | None = None

    def plan(self, now_ms: int) -> list[Question]:
        """The questions to send now, within every cap."""
        return self.plan_columns(now_ms).rows()

    def plan_columns(self, now_ms: int) -> QuestionColumns:
        """:meth:`plan` as columns."""
        self.now_ms = max(self.now_ms, int(now_ms))
        now = self.now_ms
        self._expire(now)
        cfg = self.config
        room = cfg.max_outstanding - self.outstanding
        if cfg.budget:
            room = min(room, cfg.budget - sum(self.issued))
        if room <= 0:
            return QuestionColumns.empty()
        if self.phase == "boot":
            out = self._plan_block(now, room)
            if self.phase == "boot":
                return out
            room -= len(out)
        else:
            out = QuestionColumns.empty()
        out.extend(self._plan_place(now, room))
        return out

    def _best_step(self) -> float:
        """The largest step one answer can make, from the fitted biases.

        Asked twice per batch, it changes only when the biases do, which are replaced
        (refit, new source, restore), never written in place: remembered against the
        arrays themselves (held, so their ids cannot be reused) and the pooled value.
        """
        memo = self._best_step_memo
        if (memo is not None and memo[0] is self.delta and memo[1] is self.src_answers
                and memo[2] == self.pooled):
            return memo[3]
        seen = self.src_answers > 0
        if not seen.any():
            step = abs(float(weight(self.pooled)))
        else:
            step = float(np.max(np.abs(weight(self.delta[seen]))))
        self._best_step_memo = (self.delta, self.src_answers, self.pooled, step)
        return step

    def _plan_place(self, now_ms: int, room: int) -> QuestionColumns:
        """Placement questions for items that were nudged, carried over, or never asked.

        Only those items are looked at (not every item), so a round costs time in
        proportion to the answers that arrived, not to the size of the deployment.
        """
        if room <= 0 or len(self.pool) == 0:
            return QuestionColumns.empty()
        cfg = self.config
        if self.nudged:
            self.carry.add(np.concatenate(self.nudged))
            self.nudged = []
        # The carry can hold every waiting item while the outstanding cap binds; it is
        # served a prefix at a time (smallest index first), so a round costs time in
        # proportion to its room and its nudges, not to the carry. A prefix of half again
        # the room fills it in one pass nearly always (a second pass serves the next items
        # in order, as a longer first pass would); four times the room looked at more than
        # twice the items it needed.
        served: list[np.ndarray] = []
        got = 0
        while self.carry:
            chunk = self.carry.take(max((3 * (room - got)) // 2, 1024))
            t, rest = self._serve(chunk, room - got)
            served.append(t)
            got += len(t)
            if got >= room:
                self.carry.put_back(rest)  # from the prefix just taken: below every member
                break
        targets = np.concatenate(served) if served else np.zeros(0, dtype=np.int64)
        n = len(self.keys)
        while len(targets) < room and self.cursor < n:
            end = min(n, self.cursor + max(4 * (room - len(targets)), 1024))
            more, rest = self._serve(np.arange(self.cursor, end), room - len(targets))
            self.cursor = end
            targets = np.concatenate([targets, more])
            self.carry.add(rest, ordered=True)
        if len(targets) == 0:
            return QuestionColumns.empty()
        # distinct partners for the slots one item gets in one round
        offset = planner.slot_ranks(targets)
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
            out.extend(self._issue(self.pool[ia], self.pool[ib], CHECK, now_ms))
        return out

    def _serve(self, cand: np.ndarray, room: int) -> tuple[np.ndarray, np.ndarray]:
        """(one target per question to ask, candidates left with room when ``room`` ran out)."""
        empty = np.zeros(0, dtype=np.int64)
        if len(cand) == 0 or room <= 0:
            return empty, cand.astype(np.int64)
        cfg = self.config
        led = self.ledger.items
        asking = self.items["status"][cand] <= ASKING  # waiting or asking (codes 0 and 1)
        cand = cand[asking & (led["side"][cand] == UNPLACED)]
        # Questions whose answers never count (every partner already asked of the only
        # source, say) must not go on for ever: twice the ceiling in questions also ends
        # an item's walk.
        worn = self.items["asked"][cand] >= 2 * cfg.item_ceiling
        if np.count_nonzero(worn):
            out = cand[worn & (self.items["inflight"][cand] == 0)]
            self.items["status"][out] = UNRESOLVED
            self._mark_dirty(out)
            cand = cand[~worn]
        need = planner.answers_still_needed(led["llr"][cand], self.boundary, self._best_step())
        each = planner.slots(cand, need, self.items["inflight"][cand], led["count"][cand],
                             cfg.inflight, cfg.item_ceiling)
        some = each > 0
        cand, each = cand[some], each[some]
        if len(cand) == 0:
            return empty, empty
        targets, served = planner.first_slots(cand, each, room)
        return targets.astype(np.int64, copy=False), cand[served:].astype(np.int64, copy=False)

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
        if np.count_nonzero(beyond):
            placed = np.nonzero(self.ledger.item("side") != UNPLACED)[0]
            pick = (planner.mix(h[beyond] ^ k[beyond]) % np.uint64(len(placed))).astype(np.int64)
            out[beyond] = placed[pick]
        return out

    def _issue(self, targets: np.ndarray, partners: np.ndarray, why: int,
               now_ms: int) -> QuestionColumns:
        count = len(targets)
        if count == 0:
            return QuestionColumns.empty()
        q = self.q
        start = q.n
        qids = q.grow(count)
        rows = slice(start, start + count)  # new rows are contiguous: slices, not gathers
        q["target"][rows] = targets
        q["partner"][rows] = partners
        q["ts"][rows] = now_ms
        q["state"][rows] = Q_OPEN
        q["why"][rows] = why
        self.outstanding += count
        self.issued[why] += count
        it = self.items
        if why == PLACE:
            np.add.at(it["inflight"], targets, ONE_I32)
            np.add.at(it["asked"], targets, ONE_I32)
        if why != CHECK:
            pairs = np.concatenate([targets, partners])
            first_ms = it["first_ms"]
            first_ms[pairs[first_ms[pairs] < 0]] = now_ms
        self._touch(np.asarray(targets, dtype=np.int64))
        swap = self._shown_swapped(qids)
        shown = np.concatenate([np.where(swap, partners, targets),  # as a, then as b
                                np.where(swap, targets, partners)]).astype(np.int64, copy=False)
        # arrays: the key and qid strings are made only if someone reads them (the commit
        # writes column packs without them)
        return QuestionColumns.issued(qids.astype(np.int64, copy=False), shown, self.keys,
                                      WHY_NAMES[why], now_ms)

    def _shown_swapped(self, qids: np.ndarray) -> np.ndarray:
        """Whether each question shows its partner as ``a`` (a coin per qid): how ``_issue``
        wrote it, and so the likely (a, b) order of its answer."""
        return planner.coin(qids, 3 + self._salt)

    def _expire(self, now_ms: int) -> None:
        """Close the open questions older than the timeout.

        Questions are numbered in the order they were issued and stamped with the engine's
        clock, which never goes back: the expired ones are a prefix of the numbers from
        ``q_low`` (the oldest open question) on, found by bisection. The cost is in
        proportion to the questions that expire or closed since the last call, not to the
        questions in flight.
        """
        q = self.q
        lo, n = self.q_low, q.n
        if lo >= n:
            return
        cut = lo + int(q["ts"][lo:n].searchsorted(now_ms - self.config.question_timeout_ms,
                                                  side="right"))
        if cut > lo:
            late = np.nonzero(q["state"][lo:cut] == Q_OPEN)[0]
            self._close_questions(lo + late, Q_EXPIRED)
        # move q_low past the questions closed since (a chunk at a time: the scan stops at
        # the first open one)
        state = q["state"]
        step = 256
        while lo < n:
            hi = min(n, lo + step)
            open_ = (state[lo:hi] == Q_OPEN).nonzero()[0]
            if len(open_):
                lo += int(open_[0])
                break
            lo = hi
            step *= 2
        self.q_low = lo
