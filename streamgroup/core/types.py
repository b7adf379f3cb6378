"""Plain value types exchanged with the placement engine."""

from __future__ import annotations

from collections.abc import Iterable, Iterator, Sequence
from dataclasses import dataclass
from typing import Any, NamedTuple

import numpy as np


@dataclass(frozen=True, slots=True)
class EngineConfig:
    """Tunables of the engine; validated by :meth:`check`."""

    alpha: float = 1e-3  # per-item error target of the SPRT
    inflight: int = 1  # W: questions in flight per item (capped by the fewest still needed)
    max_outstanding: int = 10_000  # global cap on questions in flight
    budget: int = 0  # total questions the engine may issue; 0 = unlimited
    item_ceiling: int = 200  # answers counted for one item before it becomes `unresolved`
    question_timeout_ms: int = 600_000  # re-issue a question not answered within this
    check_rate: float = 0.0  # fraction of questions asked between two confident items
    seed: int = 0
    # an item whose error is within alpha * (1 + slack) commits at random with the chance
    # that makes its expected error alpha (randomised boundary); 0 = strict per commit
    alpha_slack: float = 0.03


# Answer, Question and Record are NamedTuples: immutable values like frozen dataclasses,
# but about twice as cheap to build, and the worker builds three of them per answer.


class Answer(NamedTuple):
    """One answer: do items ``a`` and ``b`` belong together?"""

    a: str
    b: str
    same: bool
    source: str = ""  # who answered; "" = anonymous (pooled)
    qid: str | None = None  # the question answered, when it was one of ours


class Question(NamedTuple):
    """A question the engine wants asked."""

    qid: str
    a: str
    b: str
    why: str  # "seed", "place" or "check"
    ts_ms: int


class Record(NamedTuple):
    """Where an item stands: the value served by lookups."""

    key: str
    side: str | None
    status: str
    llr: float  # evidence (natural log) for the chosen side; undecided: for the leading side
    answers: int  # answers counted for this item
    rev: int  # times a commit was overturned
    pinned: bool


# Outcomes of add_answers, one per answer, in order.
APPLIED = "applied"
DUPLICATE = "duplicate"


# Column forms of the same values, for whole batches: the worker's hot path moves these
# between the codec, the engine and the commit without building one object per row.


@dataclass(slots=True)
class AnswerColumns:
    """A batch of answers as parallel lists (row ``k`` is one :class:`Answer`)."""

    a: list[str]
    b: list[str]
    same: list[bool]
    source: list[str]
    qid: list[str | None]

    def __len__(self) -> int:
        return len(self.a)

    @classmethod
    def empty(cls) -> AnswerColumns:
        return cls([], [], [], [], [])

    @classmethod
    def of(cls, answers: Iterable[Answer]) -> AnswerColumns:
        rows = list(answers)
        if not rows:
            return cls.empty()
        a, b, same, source, qid = (list(c) for c in zip(*rows, strict=True))
        return cls(a, b, same, source, qid)

    def rows(self) -> list[Answer]:
        return list(map(Answer, self.a, self.b, self.same, self.source, self.qid))

    def append(self, ans: Answer) -> None:
        self.a.append(ans.a)
        self.b.append(ans.b)
        self.same.append(ans.same)
        self.source.append(ans.source)
        self.qid.append(ans.qid)

    def select(self, positions: Sequence[int]) -> AnswerColumns:
        return AnswerColumns(*([col[k] for k in positions] for col in
                               (self.a, self.b, self.same, self.source, self.qid)))


class SourceRows(Sequence[str]):
    """Source names as the rows of a uint8 matrix (UTF-8, one byte length, no control
    character): what a column pack whose sources all have one length decodes to without a
    Python string per answer. It reads as a sequence of str (decoded once, when first
    read); the engine looks the rows up among the names it knows without decoding them
    (:class:`~streamgroup.core.sourcenames.NameRows`)."""

    __slots__ = ("rows", "_texts")

    def __init__(self, rows: Any) -> None:
        self.rows = rows  # np.ndarray (n, width) uint8, C-contiguous
        self._texts: list[str] | None = None

    def __len__(self) -> int:
        return len(self.rows)

    def texts(self) -> list[str]:
        if self._texts is None:
            self._texts = KeyRowAnswers.texts(self.rows)
        return self._texts

    def __getitem__(self, k: Any) -> Any:
        return self.texts()[k]

    def __iter__(self) -> Iterator[str]:
        return iter(self.texts())

    def __eq__(self, other: object) -> bool:
        return list(self) == list(other) if isinstance(other, Sequence) else NotImplemented

    __hash__ = None  # type: ignore[assignment]

    def take(self, positions: Any) -> SourceRows:
        return SourceRows(np.ascontiguousarray(self.rows[positions]))

    @classmethod
    def concatenate(cls, parts: Sequence[Sequence[str]]) -> Sequence[str]:
        """The parts joined: rows again when every part is rows of one width."""
        if all(type(p) is SourceRows for p in parts) and len(
                {p.rows.shape[1] for p in parts}) == 1:  # type: ignore[attr-defined]
            return cls(np.concatenate([p.rows for p in parts]))  # type: ignore[attr-defined]
        return [name for p in parts for name in p]


@dataclass(slots=True)
class KeyRowAnswers:
    """Answers that each name a qid, with their keys as rows of UTF-8 bytes: what a column
    pack of keys of one length decodes to without a Python string per key or qid
    (``codec``), checked by the engine against the keys its questions showed. Row ``k`` is
    the answer ``Answer(a_rows[k], b_rows[k], same[k], source[k], str(qn[k]))``."""

    a_rows: Any  # np.ndarray (n, width) uint8
    b_rows: Any  # np.ndarray (n, width) uint8
    same: Any  # np.ndarray bool
    source: Sequence[str]  # a list, or SourceRows
    qn: Any  # np.ndarray int64: the qids as numbers (written without leading zeros)

    def __len__(self) -> int:
        return len(self.qn)

    def columns(self) -> AnswerColumns:
        """The same answers as lists of text (for every path but the quick one)."""
        return AnswerColumns(self.texts(self.a_rows), self.texts(self.b_rows),
                             self.same.tolist(), list(self.source), self.qid)

    def rows(self) -> list[Answer]:
        return self.columns().rows()

    @property
    def qid(self) -> list[str]:
        return [f"{q}" for q in self.qn.tolist()]

    @staticmethod
    def texts(rows: Any) -> list[str]:
        """The rows of a uint8 matrix as text (UTF-8, no NUL in any row): joined by NUL,
        decoded and split once (a NUL between rows also proves each row valid alone)."""
        n, width = rows.shape
        if n == 0:
            return []
        buf = np.zeros((n, width + 1), dtype=np.uint8)
        buf[:, :width] = rows
        return buf.tobytes()[:-1].decode("utf-8").split("\0")

    def select(self, positions: Sequence[int]) -> KeyRowAnswers:
        pos = np.asarray(positions, dtype=np.int64)
        source = self.source
        return KeyRowAnswers(self.a_rows[pos], self.b_rows[pos], self.same[pos],
                             source.take(pos) if type(source) is SourceRows
                             else [source[k] for k in pos.tolist()], self.qn[pos])


class QuestionColumns:
    """Questions as parallel columns (row ``k`` is one :class:`Question`), read as the lists
    ``qid``, ``a``, ``b``, ``why`` and ``ts_ms``.

    The columns are held in parts, one per :meth:`extend`: either the five lists given
    to the constructor, or a :class:`QuestionColumns.Group` of arrays as the engine issues
    them. A group's lists are made only when a column is first read (then kept); the
    commit writes column packs straight from the arrays (``stream.commit``), with no string
    made per question.
    """

    @dataclass(frozen=True, slots=True, eq=False)
    class Group:
        """Questions issued together: their numbers (``qid`` is the decimal text of each),
        the indices in ``keys`` of the items they show, those shown as ``a`` then those
        shown as ``b`` (``shown`` is twice as long as ``qid``), and one why and time."""

        qid: Any  # np.ndarray int64
        shown: Any  # np.ndarray int64
        keys: Any  # the KeyIndex of the items: keys_of, key_rows
        why: str
        ts_ms: int

        def __len__(self) -> int:
            return len(self.qid)

    __slots__ = ("parts", "_cols")

    def __init__(self, qid: list[str], a: list[str], b: list[str], why: list[str],
                 ts_ms: list[int]) -> None:
        self.parts: list[tuple[list[Any], ...] | QuestionColumns.Group] = (
            [(qid, a, b, why, ts_ms)] if len(qid) else [])
        self._cols: list[list[Any] | None] = [None] * 5  # the columns made so far

    @classmethod
    def issued(cls, qid: Any, shown: Any, keys: Any, why: str,
               ts_ms: int) -> QuestionColumns:
        """The columns of one :class:`QuestionColumns.Group` (see there)."""
        out = cls.empty()
        if len(qid):
            out.parts.append(cls.Group(qid, shown, keys, why, ts_ms))
        return out

    @classmethod
    def empty(cls) -> QuestionColumns:
        return cls([], [], [], [], [])

    def __len__(self) -> int:
        return sum(len(p[0]) if isinstance(p, tuple) else len(p) for p in self.parts)

    def extend(self, other: QuestionColumns) -> None:
        self.parts += other.parts
        self._cols = [None] * 5

    def _column(self, j: int) -> list[Any]:
        parts = self.parts
        if len(parts) == 1 and isinstance(parts[0], tuple):
            return parts[0][j]  # the lists given
        if self._cols[j] is None:
            made = (1, 2) if j in (1, 2) else (j,)  # a and b together: one gather of keys
            cols: dict[int, list[Any]] = {k: [] for k in made}
            for p in parts:
                if isinstance(p, tuple):
                    for k in made:
                        cols[k] += p[k]
                elif j == 0:
                    cols[0] += [f"{n}" for n in p.qid.tolist()]  # (f-strings: quicker than str)
                elif j <= 2:
                    keys = p.keys.keys_of(p.shown)
                    cols[1] += keys[:len(p)]
                    cols[2] += keys[len(p):]
                else:
                    cols[j] += [p.why if j == 3 else p.ts_ms] * len(p)
            for k in made:
                self._cols[k] = cols[k]
        return self._cols[j]

    @property
    def qid(self) -> list[str]:
        return self._column(0)

    @property
    def a(self) -> list[str]:
        return self._column(1)

    @property
    def b(self) -> list[str]:
        return self._column(2)

    @property
    def why(self) -> list[str]:
        return self._column(3)

    @property
    def ts_ms(self) -> list[int]:
        return self._column(4)

    def __eq__(self, other: object) -> bool:
        if not isinstance(other, QuestionColumns):
            return NotImplemented
        return all(self._column(j) == other._column(j) for j in range(5))

    def __repr__(self) -> str:
        return (f"QuestionColumns(qid={self.qid!r}, a={self.a!r}, b={self.b!r}, "
                f"why={self.why!r}, ts_ms={self.ts_ms!r})")

    def rows(self) -> list[Question]:
        return list(map(Question, self.qid, self.a, self.b, self.why, self.ts_ms))


@dataclass(slots=True)
class RecordColumns:
    """Records as columns: keys, plus numpy arrays; ``side`` is a slot (0, 1, or -1 for
    none) into ``labels``, ``status`` an index into :data:`codes.STATUS_NAMES`.

    The keys are given as a list, or (``keys`` None) by where they live: a KeyIndex and the
    records' indices in it, read only as far as someone asks (:meth:`key_texts`,
    :meth:`key_rows`): a batch's HSET written from the keys' bytes needs no string."""

    keys: list[str] | None
    side: Any  # np.ndarray int8
    status: Any  # np.ndarray int8
    llr: Any  # np.ndarray float64
    answers: Any  # np.ndarray
    rev: Any  # np.ndarray
    pinned: Any  # np.ndarray bool
    labels: tuple[str, str]
    status_names: tuple[str, ...]
    key_index: Any = None
    at: Any = None  # np.ndarray int64: the records' indices in key_index

    def key_texts(self, positions: Sequence[int] | None = None) -> list[str]:
        """The keys of the records at ``positions`` (default: every record), in order."""
        if self.keys is not None:
            keys = self.keys
            return keys if positions is None else list(map(keys.__getitem__, positions))
        at = self.at if positions is None else self.at[np.asarray(positions, dtype=np.int64)]
        return self.key_index.keys_of(at)

    def key_rows(self) -> Any:
        """The keys' UTF-8 bytes as the rows of a uint8 matrix, when they come from a
        KeyIndex whose keys all have one length (``KeyIndex.key_rows``); else None."""
        return None if self.key_index is None else self.key_index.key_rows(self.at)

    def __len__(self) -> int:
        return len(self.side)

    def rows(self, positions: Iterable[int] | None = None) -> list[Record]:
        names = (*self.labels, None)
        st = self.status_names
        pos = list(range(len(self.side)) if positions is None else positions)
        keys = self.key_texts(pos)
        side, status, llr = self.side.tolist(), self.status.tolist(), self.llr.tolist()
        cnt, rev, pin = self.answers.tolist(), self.rev.tolist(), self.pinned.tolist()
        return [Record(key, names[side[k]], st[status[k]], llr[k], cnt[k], rev[k], pin[k])
                for key, k in zip(keys, pos, strict=True)]
