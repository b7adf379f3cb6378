"""Checking what is handed to the engine: one reason per bad input, nothing applied."""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..errors import EngineInputError
from . import validate
from .pairset import MAX_SOURCES
from .types import Answer, AnswerColumns, KeyRowAnswers, SourceRows

_NONE = np.zeros(0, dtype=np.int64)


def digits_to_int64(texts: Sequence[Any]) -> np.ndarray | None:
    """The numbers written by ``texts`` if every one is a non-empty string of at most 18
    ASCII digits, else None.

    The texts are checked as one joined string and parsed by numpy from one
    space-separated string: about a third of the time of a check per string and
    ``np.array(texts, dtype=int64)`` (~25 against ~75 us for 500 qids).
    """
    try:
        joined = "".join(texts)
    except TypeError:  # something that is not text
        return None
    if not (joined.isdigit() and joined.isascii()) or max(map(len, texts)) > 18:
        return None
    out = np.fromstring(" ".join(texts), dtype=np.int64, sep=" ")
    return out if len(out) == len(texts) else None  # an empty text leaves no number


@dataclass(slots=True)
class Intake:
    """One checked batch of answers, as arrays."""

    keys: list[str]  # the a keys, then the b keys
    both: np.ndarray  # their indices (a's, then b's), -1 for keys not registered yet
    unknown: np.ndarray  # the positions of those -1s in ``both``
    sources: list[str]
    same: np.ndarray
    with_q: np.ndarray  # positions of answers that name a qid
    qn: np.ndarray  # those qids as numbers
    src: np.ndarray | None  # the source ids when every source is known, else None
    # every answer names an issued qid and holds its question's keys as shown: the qids,
    # flags and sources alone say the whole batch (the journal's op ``q``)
    by_qid: bool = False


class IntakeMixin:
    """Validation of items and answers (part of :class:`~streamgroup.core.engine.Engine`)."""

    # Attributes provided by Engine: keys, labels, ledger, q, source_index, source_names,
    # source_rows, _shown_swapped.
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

    def _register_missing(self, keys: list[str], idx: np.ndarray, unknown: np.ndarray
                          ) -> np.ndarray:
        """``idx`` with the keys at positions ``unknown`` (ascending) registered, in order."""
        if not len(unknown):
            return idx
        out = idx.copy()
        out[unknown] = self._register_many([keys[k] for k in unknown.tolist()])
        return out

    def validate_answer(self, ans: Any) -> str | None:
        if type(ans) is not Answer:
            return f"expected an Answer, got {type(ans).__name__}"
        try:
            self._check_answers(AnswerColumns.of([ans]))
        except EngineInputError as exc:
            return str(exc).split(": ", 1)[1]
        return None

    def _check_answers(self, answers: AnswerColumns) -> Intake:
        """Raise EngineInputError at the first bad answer, else return the batch as arrays.

        Keys already registered were checked when they arrived, so the common case costs
        a few vectorised operations per batch rather than string checks per answer. In the
        usual batch every answer names an issued qid and its keys are those of the
        question's pair (confirmed by string comparison): such keys are known, distinct
        unless the pair is not, and match their question, so those checks are skipped.
        """
        count = len(answers)
        a_keys, b_keys = answers.a, answers.b
        names, qids, flags = answers.source, answers.qid, answers.same
        if not (len(b_keys) == len(names) == len(qids) == len(flags) == count):
            raise EngineInputError("answer columns of different lengths")
        # the qids first: the pair each names is the likely (a, b) of its answer
        with_q: Sequence[int]
        if None not in qids:
            with_q, wq = range(count), np.arange(count)
        else:
            with_q = [pos for pos, q in enumerate(qids) if q is not None]
            wq = np.asarray(with_q, dtype=np.int64)
        qid_bad: dict[int, str] = {}
        texts = qids if len(with_q) == count else [qids[pos] for pos in with_q]
        parsed = digits_to_int64(texts) if with_q else None
        if parsed is not None:
            qn = parsed
        else:
            qn = np.full(len(with_q), -1, dtype=np.int64)
            for k, q in enumerate(texts):
                err = validate.qid(q)
                if err:
                    qid_bad.setdefault(with_q[k], err)
                elif q.isascii() and len(q) < 19:
                    qn[k] = int(q)
        # parsed digits are never negative; the fallback marks an unusable qid with -1
        issued = qn < self.q.n if parsed is not None else (qn >= 0) & (qn < self.q.n)
        every = np.count_nonzero(issued) == count  # each answer names an issued qid
        safe = qn if every else np.where(issued, qn, 0)
        t, p = self.q["target"][safe], self.q["partner"][safe]  # each qid's pair
        keys = a_keys + b_keys
        guess = self._pair_guess(qn, t, p, wq, issued, every, count)
        both = self.keys.lookup_guessed(keys, guess)  # one call: half the costs
        held = every and both is guess  # every key is its question's
        ia, ib = both[:count], both[count:]
        unknown = _NONE if held else (both < 0).nonzero()[0]
        bad: dict[int, str] = {}
        for pos in sorted({k % count for k in unknown.tolist()}):
            err = ((ia[pos] < 0 and validate.item_key(a_keys[pos], "a"))
                   or (ib[pos] < 0 and validate.item_key(b_keys[pos], "b")))
            if not err and a_keys[pos] == b_keys[pos]:
                err = "a and b are the same item"
            if err:
                bad[pos] = err
        one_item = ia == ib
        if len(unknown):
            one_item &= ia >= 0
        for pos in one_item.nonzero()[0].tolist():
            bad.setdefault(pos, "a and b are the same item")
        if set(map(type, flags)) - {bool}:
            for pos, f in enumerate(flags):
                err = validate.same_flag(f)
                if err:
                    bad.setdefault(pos, err)
        sources = self.source_index
        try:  # the usual batch: every source known, and their ids found in one pass
            src: np.ndarray | None = np.fromiter(map(sources.__getitem__, names),
                                                 dtype=np.int64, count=count)
            new_sources: set[str] = set()
        except KeyError:
            src, new_sources = None, set(names) - sources.keys()
        if new_sources:
            for pos, n in enumerate(names):
                if n in new_sources:
                    err = validate.source_id(n)
                    if not err and len(sources) + len(new_sources) > MAX_SOURCES:
                        err = f"too many sources (limit {MAX_SOURCES})"
                    if err:
                        bad.setdefault(pos, err)
        for pos, err in qid_bad.items():
            bad.setdefault(pos, err)
        if with_q and not held:
            for k in np.nonzero(~issued)[0].tolist():
                bad.setdefault(with_q[k], f"qid {qids[with_q[k]]!r} is not one this "
                                          "worker issued")
            i, j = ia[wq], ib[wq]
            match = ((t == i) & (p == j)) | ((t == j) & (p == i))
            for k in np.nonzero(issued & ~match)[0].tolist():
                bad.setdefault(with_q[k], f"qid {qids[with_q[k]]!r} was asked "
                                          "about another pair")
        if bad:
            pos = min(bad)
            raise EngineInputError(f"answer {pos}: {bad[pos]}")
        same = np.array(flags, dtype=bool) if count else np.zeros(0, dtype=bool)
        return Intake(keys, both, unknown, names, same, wq, qn, src, held)

    def _check_key_rows(self, answers: KeyRowAnswers) -> Intake | None:
        """The usual batch of :meth:`_check_answers`, its keys as byte rows: every answer
        names an issued qid, its keys are byte for byte those its question showed (in the
        order shown), its two items differ, and every source is known. Then the answers
        are good and their items and sources are known: the Intake needs no string. None
        when any of that fails (the caller then checks the text as usual)."""
        count = len(answers)
        qn = answers.qn
        if not count or not self._all_issued(qn):
            return None
        wq, guess = self._shown_pairs(qn)
        if np.count_nonzero(guess[:count] == guess[count:]):
            return None
        shown = self.keys.key_rows(guess)
        a_rows, b_rows = answers.a_rows, answers.b_rows
        if shown is None or shown.shape[1] != a_rows.shape[1]:
            return None
        if not (np.array_equal(shown[:count], a_rows) and np.array_equal(shown[count:], b_rows)):
            return None
        names = answers.source
        if type(names) is SourceRows:  # looked up as rows, without a str each
            src = self.source_rows.ids(names.rows, self.source_names)
            if src is None:
                return None
        else:
            try:
                src = np.fromiter(map(self.source_index.__getitem__, names), dtype=np.int64,
                                  count=count)
            except KeyError:
                return None
        return Intake([], guess, _NONE, answers.source, answers.same, wq, qn, src, True)

    def _intake_by_qid(self, qn: np.ndarray, same: np.ndarray, sources: list[str]) -> Intake:
        """The Intake of a batch that an earlier :meth:`_check_answers` or
        :meth:`_check_key_rows` found ``by_qid`` (replayed from the journal: not checked
        again). Its keys are its questions' as shown, so no key is read."""
        count = len(qn)
        if not (count == len(same) == len(sources)) or (count and not self._all_issued(qn)):
            raise EngineInputError("answers by qid: columns of different lengths, or a qid "
                                   "that was never issued")
        wq, guess = self._shown_pairs(qn)
        return Intake([], guess, _NONE, sources, same, wq, qn, None, True)

    def _all_issued(self, qn: np.ndarray) -> bool:
        """Whether every qid of the (non-empty) ``qn`` was issued."""
        return int(qn.min()) >= 0 and int(qn.max()) < self.q.n

    def _shown_pairs(self, qn: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """(positions, the item indices of each answer's pair as its question showed it:
        the a's, then the b's) for answers that all name the issued qids ``qn``."""
        count = len(qn)
        t, p = self.q["target"][qn], self.q["partner"][qn]
        wq = np.arange(count)
        return wq, self._pair_guess(qn, t, p, wq, np.ones(count, dtype=bool), True, count)

    def _pair_guess(self, qn: np.ndarray, t: np.ndarray, p: np.ndarray, wq: np.ndarray,
                    issued: np.ndarray, every: bool, count: int) -> np.ndarray:
        """The likely indices of the answers' keys (the a's, then the b's; -1 where no
        issued qid says): its question's pair, in the order the question showed it."""
        swap = self._shown_swapped(qn)
        first, second = np.where(swap, p, t), np.where(swap, t, p)
        if every:
            return np.concatenate([first, second], dtype=np.int64)
        guess = np.full(2 * count, -1, dtype=np.int64)
        at = wq[issued]
        guess[at] = first[issued]
        guess[count + at] = second[issued]
        return guess

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
