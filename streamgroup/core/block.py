"""The cold start inside the engine: the bootstrap block, its questions and its solution."""

from __future__ import annotations

from typing import Any

import numpy as np

from . import bootstrap
from .codes import ANCHOR_FACTOR, BLOCK_MAX, BLOCK_START, MIN_ANCHORS, PLACED, SEED, UNRESOLVED
from .evidence import decision_error
from .ledger import UNPLACED
from .types import QuestionColumns


class BlockMixin:
    """Bootstrap of the reference set (part of :class:`~streamgroup.core.engine.Engine`)."""

    def _block_mark(self, a: Any, b: Any, value: int) -> None:
        """Set the block pairs (a[k], b[k]) to ``value`` (0 unasked, 1 asked, 2 answered).

        A pair already answered stays answered. Its question can expire after the pair was
        answered (late, or by an answer without its qid); asking it again would be wasted,
        and could never complete it if the same source answered, since that repeat is a
        duplicate and counts for nothing.
        """
        pos = self.items["block"]
        pa, pb = np.atleast_1d(pos[a]), np.atleast_1d(pos[b])
        ok = (pa >= 0) & (pb >= 0)
        if value != 2:
            ok[ok] = self.block_state[pa[ok], pb[ok]] != 2
        pa, pb = pa[ok], pb[ok]
        self.block_state[pa, pb] = value
        self.block_state[pb, pa] = value

    def _mark_block_answers(self, a: np.ndarray, b: np.ndarray) -> None:
        self._block_mark(a, b, 2)

    def _mark_ledger_pairs(self, state: np.ndarray) -> None:
        """Mark answered, in ``state``, every block pair with an answer in the ledger."""
        pos = self.items["block"]
        la, lb = self.ledger.answer("a"), self.ledger.answer("b")
        both = (pos[la] >= 0) & (pos[lb] >= 0)
        state[pos[la[both]], pos[lb[both]]] = 2
        state[pos[lb[both]], pos[la[both]]] = 2

    def _repair_orphans(self) -> None:
        """Pairs marked asked while no question is open (only seed questions are open in
        the bootstrap) wait for an answer that cannot come: an engine restored from a
        snapshot taken while an expiry had undone an answered pair holds such pairs. Those
        with an answer in the ledger are answered; the others are asked again."""
        st = self.block_state
        if self.outstanding == 0 and (st == 1).any():
            st[st == 1] = 0
            self._mark_ledger_pairs(st)

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
        self._mark_ledger_pairs(state)  # answered before they were in the block: answered
        self.block_state = state

    def _plan_block(self, now_ms: int, room: int) -> QuestionColumns:
        n = len(self.keys)
        if len(self.block) == 0:
            if n < 2:
                return QuestionColumns.empty()
            pinned = int(self.ledger.item("pinned").sum())
            self._extend_block(min(n, max(BLOCK_START, min(pinned, BLOCK_MAX))))
        elif len(self.block) < BLOCK_START and n > len(self.block):
            self._extend_block(min(n, BLOCK_START))
        self._repair_orphans()
        st = self.block_state
        if (st == 2).all():
            self._solve_block()
            return QuestionColumns.empty()
        i, j = np.nonzero(np.triu(st == 0, 1))
        if len(i) == 0 or room <= 0:
            return QuestionColumns.empty()
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
        if strong.sum() < MIN_ANCHORS and not can_grow:
            # every item is in the block already: settle for members that meet alpha
            self.ledger.redirect_all()
            self.ledger.recompute(self.delta, self.se, settle=True)
            strong = self._admit(members, pinned, factor=1.0)
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
        self._mark_dirty(members)
        self.phase = "run"
        self.cursor = 0  # every item is looked at once more
        if len(self.pool) == 0:  # nothing could be learned: a person must look
            st = self.items.view("status")
            st[(st != PLACED)] = UNRESOLVED
            self._mark_dirty(np.arange(len(self.keys)))
            return
        self._decide(np.arange(len(self.keys)), ordered=True)

    def _admit(self, members: np.ndarray, pinned: np.ndarray, factor: float = ANCHOR_FACTOR
               ) -> np.ndarray:
        """Members whose evidence from the other admitted members alone is strong.

        Dropping a weak member removes its answers from the others' evidence, so the
        check repeats until the admitted set is stable: every reference member then
        stands on answers among reference members only. Each round drops only the weaker
        half of the failing members, so that a small block does not collapse at once.
        """
        led = self.ledger.items
        keep = np.ones(len(members), dtype=bool)
        sides = led["side"][members].copy()
        for _ in range(len(members)):
            err = decision_error(led["llr"][members], self.ledger.spread(members, self.shared))
            failing = keep & ~pinned & (err > self.config.alpha * factor)
            if not failing.any():
                break
            cut = np.median(err[failing])
            keep = keep & ~(failing & (err >= cut))
            led["side"][members] = np.where(keep, sides, UNPLACED)
            self.ledger.redirect_all()
            self.ledger.recompute(self.delta, self.se)
        led["side"][members] = sides
        return keep
