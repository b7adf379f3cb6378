"""Plain value types exchanged with the placement engine."""

from __future__ import annotations

from dataclasses import dataclass
from typing import NamedTuple


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
