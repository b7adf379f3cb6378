"""Decisions inside the engine: commits, the randomised boundary, revisions, give-ups."""

from __future__ import annotations

import math

import numpy as np

from . import noise, planner
from .codes import ANCHOR_FACTOR, PLACED, UNRESOLVED
from .columns import uniq
from .evidence import decision_error
from .ledger import UNPLACED


class DecideMixin:
    """Commit, revise or give up (part of :class:`~streamgroup.core.engine.Engine`)."""

    def _refit(self, cold: bool = False, current: bool = False) -> None:
        # warm refits move little: one EM round each (the estimate converges across them)
        fit = noise.fit(self.ledger, self.delta, self.se, iterations=3 if cold else 1,
                        cold=cold, current=current)
        self.delta, self.se, self.src_answers = fit.delta, fit.se, fit.answers
        self.pooled, self.pooled_se = fit.pooled, fit.pooled_se
        self.counted_at_fit = self._counted()
        share = self.ledger.answers_per_source(len(self.delta)).astype(float)
        share /= max(share.sum(), 1.0)
        self.shared = float((share * share).sum())

    def _decide(self, touched: np.ndarray, ordered: bool = False) -> None:
        """Commit, revise or give up on the touched items, following every consequence.

        ``ordered``: ``touched`` is already sorted and distinct (every item, after a refit),
        so the sort is skipped (np.sort takes ~5 ms over 100,000 items, sorted or not).
        """
        led = self.ledger.items
        alpha = self.config.alpha
        todo = np.asarray(touched, dtype=np.int64) if ordered else uniq(touched)
        for _ in range(64):
            if len(todo) == 0:
                return
            todo = todo[~led["pinned"][todo]]
            # A placed item can only change by flipping: look at it only if its evidence
            # now leans the other way (after a refit this skips nearly every item).
            side, llr = led["side"][todo], led["llr"][todo]
            todo = todo[(side == UNPLACED) | ((llr > 0) != (side == 1))]
            llr = led["llr"][todo]
            # Evidence too weak to pass the boundary whatever its spread can only end in
            # a give-up (after a refit, nearly every open item): its error is not computed.
            far = np.abs(llr) < self._hopeless_below()
            if np.count_nonzero(far):
                self._give_up(todo[far])
                near = ~far
                todo, llr = todo[near], llr[near]
            spread = self.ledger.spread(todo, self.shared)
            err = decision_error(llr, spread)
            open_ = led["side"][todo] == UNPLACED
            ok = err <= alpha
            commit = self._may_commit(todo, err, spread, open_)
            newly = todo[commit]
            # a placed item is here only if its evidence leans the other way (above): it
            # flips once that is sure
            flips = todo[ok & ~open_]
            if len(newly):
                led["side"][newly] = llr[commit] > 0
                self._committed(newly)
            ok |= commit
            if len(flips):
                led["side"][flips] = 1 - led["side"][flips]
                self.items["rev"][flips] += 1
                self.revisions += len(flips)
                self._mark_dirty(flips)
            strong = todo[err <= alpha * ANCHOR_FACTOR]
            if len(strong):
                self._grow_pool(strong)
            self._give_up(todo[~ok])
            if len(flips):
                self.ledger.recompute(self.delta, self.se)
                todo = np.arange(len(self.keys))
            elif len(newly):
                released = self.ledger.release_pending()
                if not len(released):
                    return
                todo = self.ledger.count(released, self.delta, self.se)
                self._mark_dirty(todo)  # held answers now count: new evidence
                todo = uniq(todo)
            else:
                return

    def _hopeless_below(self) -> float:
        """Evidence below which no item can commit, flip or anchor the pool.

        ``decision_error`` adds three non-negative terms, the middle one (2/3) / (1 +
        e^|llr|) whatever the spread, so an item whose middle term alone exceeds alpha (1 +
        slack) cannot pass; the bound is taken a millionth lower to stay clear of rounding.
        """
        limit = self.config.alpha * max(1.0, 1.0 + self.config.alpha_slack)
        ratio = (2.0 / 3.0) / limit - 1.0
        if ratio <= 1.0:
            return 0.0  # (an alpha this large: nothing is hopeless)
        bound = math.log(ratio)
        return bound - 1e-6 * max(1.0, bound)

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
        if not np.count_nonzero(loose):
            return strict
        llr = self.ledger.items["llr"][idx[loose]]
        nxt = decision_error(np.abs(llr) + self._best_step(), spread[loose])
        e = err[loose]
        pi = (alpha - nxt) / np.maximum(e - nxt, 1e-300)
        np.maximum(pi, 0.0, out=pi)  # clipped to [0, 1] (np.clip has a costly wrapper)
        np.minimum(pi, 1.0, out=pi)
        count = self.ledger.items["count"][idx[loose]].astype(np.uint64)
        coin = planner.uniform(idx[loose].astype(np.uint64) * np.uint64(1 << 20) + count,
                              29 + self._salt)
        out = strict.copy()
        out[np.nonzero(loose)[0][coin < pi]] = True
        return out

    def _committed(self, idx: np.ndarray) -> None:
        st = self.items["status"]
        st[idx] = PLACED
        self._mark_dirty(idx)
        first = self.items["first_ms"][idx]
        asked = first[first >= 0]
        self.latencies.extend(((self.now_ms - asked) / 1000.0).tolist())

    def _give_up(self, idx: np.ndarray) -> None:
        cnt = self.ledger.items["count"][idx]
        full = cnt >= self.config.item_ceiling
        if not np.count_nonzero(full):
            return
        st = self.items["status"][idx]
        stuck = idx[full & (st != PLACED) & (st != UNRESOLVED)]
        if len(stuck):
            self.items["status"][stuck] = UNRESOLVED
            self._mark_dirty(stuck)

    def _grow_pool(self, idx: np.ndarray) -> None:
        if self.phase != "run":
            return
        idx = idx[self.ledger.items["side"][idx] != UNPLACED]
        known = np.isin(idx, self.pool)
        if (~known).any():
            self.pool = np.concatenate([self.pool, idx[~known]])
