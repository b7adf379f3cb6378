"""The evidence ledger: every counted answer, and the evidence it gives each item.

Evidence is kept as one signed log-likelihood ratio per item (side 1 over side 0). An
answer counts for an item once its partner is placed: answers against a placed item count
at once; an answer between two unplaced items waits (``direction`` 0) and counts for one
of them as soon as the other is placed. ``direction`` is a bit set: 1 = counts for ``a``,
2 = counts for ``b``. For more than two groups the per-item scalar becomes a vector over
groups (plus "none of these yet"); the answer store and the directions stay as they are.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from .columns import ONE_I32, Columns
from .evidence import partner_shrink, reference_eps, signed_steps, signed_weights

UNPLACED = -1
# pairs weighed per pass in a recount (and answers per pass in the M-step): the weights of
# 4 million pairs took 0.026 s in chunks of 65,536, 0.044 s in chunks of 262,144 and
# 0.046 s in one pass; a whole warm refit over 2 million answers, 0.17 s against 0.22 s
# (scripts/bench_refit.py)
WEIGH_CHUNK = 1 << 16
# answers per slice of a full recount (and of the M-step), at least twice the items: each
# slice's temporaries (about 100 bytes an answer) are freed before the next one is made,
# so that a refit reuses the memory of the last one rather than touching new pages as the
# ledger grows; the per-item sums are added slice by slice
RECOUNT_SLICE = 1 << 19


@dataclass(slots=True)
class Counted:
    """(answer, counted endpoint) pairs: the endpoint the evidence is for, the other
    one, the answer's source, and the sign of its vote on the target (+1 or -1)."""

    target: np.ndarray
    partner: np.ndarray
    src: np.ndarray
    sign: np.ndarray


_ITEM_FIELDS: dict[str, tuple[Any, Any]] = {
    "side": (np.int8, UNPLACED),
    "llr": (np.float64, 0.0),
    "s1": (np.float64, 0.0),  # sum of signed step sensitivities (shared-source part)
    "s2": (np.float64, 0.0),  # sum of squared step sensitivities (independent part)
    "count": (np.int32, 0),
    "pinned": (np.bool_, False),
}
_ANSWER_FIELDS: dict[str, Any] = {
    "a": np.int32,
    "b": np.int32,
    "src": np.int32,
    "same": np.int8,  # +1 same, -1 different
    "direction": np.int8,
}


class Ledger:
    """Item evidence and the answer store, as growable numpy columns."""

    def __init__(self) -> None:
        self.items = Columns(_ITEM_FIELDS)
        self.answers = Columns({k: (dt, 0) for k, dt in _ANSWER_FIELDS.items()}, 64)
        self.pending = np.zeros(0, dtype=np.int64)  # answers with direction 0
        self._per_source = np.zeros(0, dtype=np.int64)  # answers by source, kept current

    @property
    def n_items(self) -> int:
        return self.items.n

    @property
    def n_answers(self) -> int:
        return self.answers.n

    # -- views ----------------------------------------------------------------
    def item(self, name: str) -> np.ndarray:
        return self.items.view(name)

    def answer(self, name: str) -> np.ndarray:
        return self.answers.view(name)

    def answer_slices(self) -> list[slice]:
        """Every answer row, in slices of at least ``RECOUNT_SLICE`` (one when few)."""
        size = max(RECOUNT_SLICE, 2 * self.n_items)
        n = self.n_answers
        return [slice(lo, min(lo + size, n)) for lo in range(0, n, size)] or [slice(0, 0)]

    def answers_per_source(self, n_sources: int) -> np.ndarray:
        """How many answers each of sources 0 to ``n_sources`` - 1 gave (a new array). Kept
        as the answers come: a count over every answer took 3.4-4.3 ms at 2,400,000
        answers, at each refit, progress sample and refresh of the metrics."""
        out = np.zeros(n_sources, dtype=np.int64)
        k = min(n_sources, len(self._per_source))
        out[:k] = self._per_source[:k]
        return out

    def _count_sources(self, src: np.ndarray) -> None:
        got = np.bincount(src, minlength=len(self._per_source))
        if len(got) > len(self._per_source):
            got[:len(self._per_source)] += self._per_source
            self._per_source = got
        else:
            self._per_source += got

    # -- growth ---------------------------------------------------------------
    def add_items(self, count: int) -> np.ndarray:
        return self.items.grow(count)

    def append_answers(self, a: np.ndarray, b: np.ndarray, src: np.ndarray,
                       same: np.ndarray) -> slice:
        """Store answers; set their directions from the current placements. Returns
        their rows (new rows are contiguous: a slice, read as views rather than gathers)."""
        ans = self.answers
        start = ans.n
        ans.grow(len(a))
        rows = slice(start, start + len(a))
        ans["a"][rows] = a
        ans["b"][rows] = b
        ans["src"][rows] = src
        self._count_sources(ans["src"][rows])
        vote = np.array(same, dtype=np.int8)  # a copy: +1 same, -1 different
        vote *= 2
        vote -= 1
        ans["same"][rows] = vote
        side = self.items["side"]
        direction = (side[a] != UNPLACED) * np.int8(2)  # counts for b (bit 2) if a is placed
        direction += side[b] != UNPLACED  # and for a (bit 1) if b is
        ans["direction"][rows] = direction
        waiting = (direction == 0).nonzero()[0]
        if len(waiting):
            self.pending = np.concatenate([self.pending, start + waiting])
        return rows

    # -- evidence -------------------------------------------------------------
    def counted_pairs(self, idx: np.ndarray | slice | None = None) -> Counted:
        """The (answer, counted endpoint) pairs among answers ``idx`` (default: every
        answer, as views), apart from their weights: what a recount of unchanged
        placements and directions can share between several sets of weights."""
        ans = self.answers
        if idx is None:
            idx = slice(0, self.n_answers)
        a, b, d = ans["a"][idx], ans["b"][idx], ans["direction"][idx]
        src, same = ans["src"][idx], ans["same"][idx]
        for_a = (d & 1).view(np.bool_)  # bit 1, as 0/1 bytes: a bool mask as it is
        for_b = (d >> 1).view(np.bool_)  # bit 2 (directions are 0 to 3)
        k = int(np.count_nonzero(for_a))
        m = k + int(np.count_nonzero(for_b))

        def both(first: np.ndarray, second: np.ndarray) -> np.ndarray:
            """first[for_a] then second[for_b], written straight into one array (about a
            quarter of the time of two masked copies and a concatenation)."""
            out = np.empty(m, dtype=first.dtype)
            first.compress(for_a, out=out[:k])
            second.compress(for_b, out=out[k:])
            return out

        target, partner = both(a, b), both(b, a)
        # (2 side - 1) x same, made in int8 (every value is +1 or -1: exact) and widened
        # once, rather than three passes over float64
        vote = self.items["side"].take(partner)
        vote *= 2
        vote -= 1
        vote *= both(same, same)
        return Counted(target, partner, both(src, src), vote.astype(np.float64))

    def _partner_discounts(self) -> np.ndarray:
        """Each item's discount as a partner, from its current evidence: for a pass over
        many answers, one exp per item gathered per answer instead of one per answer (the
        same values)."""
        return partner_shrink(reference_eps(self.item("llr"), self.item("pinned")))

    def _weigh(self, pairs: Counted, delta: np.ndarray, se: np.ndarray,
               trust_partners: bool = False, need_spread: bool = True,
               per_item: np.ndarray | None = None
               ) -> tuple[np.ndarray, np.ndarray | None]:
        """(step, sensitivity) of each pair: the sensitivity is signed like the answer's
        vote, so that answers of one source add up (their bias errors are shared) while
        those of different sources do not. Without ``need_spread``, the sensitivity is
        None and not computed (the steps are the same bit for bit). ``per_item``: the
        partners' discounts, if the caller has them."""
        partner, src, sign = pairs.partner, pairs.src, pairs.sign
        m = len(partner)
        if trust_partners:
            per_item = None
        elif per_item is None and m > self.n_items:
            per_item = self._partner_discounts()
        if m <= WEIGH_CHUNK:
            return self._weigh_part(partner, src, sign, delta, se, trust_partners, per_item,
                                    need_spread)
        # A recount weighs millions of pairs: in chunks, the temporaries stay in the
        # cache and in memory already mapped, and only the results are full size
        # (elementwise, so the values are the same bit for bit).
        step = np.empty(m)
        spread = np.empty(m) if need_spread else None
        for lo in range(0, m, WEIGH_CHUNK):
            part = slice(lo, lo + WEIGH_CHUNK)
            self._weigh_part(partner[part], src[part], sign[part], delta, se,
                             trust_partners, per_item, need_spread,
                             out=(step[part], None if spread is None else spread[part]))
        return step, spread

    def _weigh_part(self, partner: np.ndarray, src: np.ndarray, sign: np.ndarray,
                    delta: np.ndarray, se: np.ndarray, trust_partners: bool,
                    per_item: np.ndarray | None, need_spread: bool = True,
                    out: tuple[np.ndarray, np.ndarray | None] | None = None
                    ) -> tuple[np.ndarray, np.ndarray | None]:
        if trust_partners:
            shrink = sign.copy()  # (a shrink of 1)
        elif per_item is not None:
            shrink = per_item.take(partner)
            shrink *= sign
        else:
            shrink = partner_shrink(reference_eps(self.items["llr"][partner],
                                                  self.items["pinned"][partner]))
            shrink *= sign
        if not need_spread:
            return signed_steps(delta.take(src), shrink,
                                out=None if out is None else out[0]), None
        return signed_weights(delta.take(src), se.take(src), shrink,
                              out=None if out is None else (out[0], out[1]))

    def _contributions(self, idx: np.ndarray | slice, delta: np.ndarray, se: np.ndarray,
                       trust_partners: bool = False
                       ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """(target, step, sensitivity) for every (answer, counted endpoint) among ``idx``."""
        pairs = self.counted_pairs(idx)
        step, spread = self._weigh(pairs, delta, se, trust_partners)
        assert spread is not None
        return pairs.target, step, spread

    def count(self, idx: np.ndarray | slice, delta: np.ndarray, se: np.ndarray
              ) -> np.ndarray:
        """Add the evidence of answers ``idx`` (positions, or a slice of rows; already given
        directions); return targets."""
        if not isinstance(idx, slice) and len(idx) == 0:
            return np.zeros(0, dtype=np.int64)
        target, step, spread = self._contributions(idx, delta, se)
        np.add.at(self.items["llr"], target, step)
        np.add.at(self.items["s1"], target, spread)
        np.add.at(self.items["s2"], target, spread * spread)
        np.add.at(self.items["count"], target, ONE_I32)
        return target

    def recompute(self, delta: np.ndarray, se: np.ndarray, settle: bool = False,
                  pairs: Counted | None = None, llr_only: bool = False) -> None:
        """Rebuild every item's evidence from all counted answers (after new weights).

        Each answer is discounted by its partner's chance of being wrong, read from the
        partner's current evidence; ``settle`` first builds that evidence without the
        discount, for items placed together whose evidence is not known yet. ``pairs``:
        :meth:`counted_pairs` of every answer, if the caller has it (placements and
        directions unchanged since); without them the answers are taken slice by slice
        (:meth:`answer_slices`). ``llr_only``: rebuild the evidence alone, for a step
        whose other sums a later full recount replaces.
        """
        n = self.n_items

        def parts() -> Any:
            if pairs is not None:
                return [pairs]
            return (self.counted_pairs(rows) for rows in self.answer_slices())

        if settle:
            llr = None
            for part in parts():
                step, _ = self._weigh(part, delta, se, trust_partners=True,
                                      need_spread=False)
                llr = running_sum(llr, np.bincount(part.target, weights=step,
                                                   minlength=n)[:n])
            self.items["llr"][:n] = llr
        per_item = self._partner_discounts() if 2 * self.n_answers > n else None
        sums: list[np.ndarray | None] = [None] * 4  # llr, s1, s2, count
        for part in parts():
            step, spread = self._weigh(part, delta, se, need_spread=not llr_only,
                                       per_item=per_item)
            # one widening of the targets for the four sums (bincount takes intp)
            target = part.target.astype(np.intp)
            sums[0] = running_sum(sums[0], np.bincount(target, weights=step,
                                                       minlength=n)[:n])
            if spread is None:
                continue
            sums[1] = running_sum(sums[1], np.bincount(target, weights=spread,
                                                       minlength=n)[:n])
            spread *= spread
            sums[2] = running_sum(sums[2], np.bincount(target, weights=spread, minlength=n)[:n])
            sums[3] = running_sum(sums[3], np.bincount(target, minlength=n)[:n])
        for name, got in zip(("llr", "s1", "s2", "count"), sums, strict=True):
            if got is not None:
                self.items[name][:n] = got

    def spread(self, idx: np.ndarray, shared: float) -> np.ndarray:
        """Standard deviation of each item's evidence due to the uncertainty of the biases.

        Errors of one source's bias move all its answers together, those of different
        sources independently. ``shared`` is the chance that two answers come from the
        same source (1 with a single source): the variance blends the two extremes.
        """
        s1, s2 = self.items["s1"][idx], self.items["s2"][idx]
        return np.sqrt(shared * s1 * s1 + (1.0 - shared) * s2)

    def release_pending(self) -> np.ndarray:
        """Give directions to waiting answers whose partner is now placed; return them."""
        if len(self.pending) == 0:
            return self.pending
        ans = self.answers
        p = self.pending
        side = self.items["side"]
        placed_a = side[ans["a"][p]] != UNPLACED
        placed_b = side[ans["b"][p]] != UNPLACED
        ready = placed_a | placed_b
        if not ready.any():
            return np.zeros(0, dtype=np.int64)
        got = p[ready]
        ans["direction"][got] = (np.where(placed_b[ready], 1, 0)
                                 | np.where(placed_a[ready], 2, 0))
        self.pending = p[~ready]
        return got

    def redirect_all(self) -> None:
        """Recompute every answer's direction from the current placements.

        Used after the bootstrap and after revisions, when the set of placed items changed
        in ways the incremental path does not follow.
        """
        ans = self.answers
        side = self.items["side"]
        a, b = self.answer("a"), self.answer("b")
        placed_a = side[a] != UNPLACED
        placed_b = side[b] != UNPLACED
        d = np.where(placed_b, 1, 0) | np.where(placed_a, 2, 0)
        ans["direction"][: self.n_answers] = d
        self.pending = np.nonzero(d == 0)[0]

    # -- snapshot -------------------------------------------------------------
    def to_state(self) -> dict[str, Any]:
        return {
            "items": self.items.to_state(),
            "answers": self.answers.to_state(),
            "pending": self.pending.astype(np.int64).tobytes(),
        }

    @classmethod
    def from_state(cls, st: dict[str, Any]) -> Ledger:
        out = cls()
        out.items.load_state(st["items"])
        out.answers.load_state(st["answers"])
        out.pending = np.frombuffer(st["pending"], dtype=np.int64).copy()
        src = out.answer("src")
        for rows in out.answer_slices():  # (slice by slice: no full-size temporary)
            out._count_sources(src[rows])
        return out

    def nbytes(self) -> int:
        return self.items.nbytes() + self.answers.nbytes() + self.pending.nbytes


def running_sum(total: np.ndarray | None, part: np.ndarray) -> np.ndarray:
    """A running sum over slices; the first slice's sums as they are (bit for bit those
    of one pass when there is a single slice)."""
    if total is None:
        return part
    total += part
    return total
