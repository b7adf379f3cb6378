"""Building the one MULTI/EXEC that commits a batch, and sending it.

Order inside the transaction (all or nothing, so the order only matters to readers of a
half-written reply, which MULTI/EXEC rules out):

1. ``HSET {NS}:assign`` for every record that changed;
2. ``XADD {NS}:decisions`` for records whose side or status changed (``MAXLEN ~``);
3. ``XADD {NS}:questions``: one entry per question, or entries with a ``pack`` field;
4. ``XADD {NS}:dead`` for rejected entries;
5. the journal entry (``XADD {NS}:journal``) - or, when it is time, ``SET {NS}:snapshot``
   plus ``DEL {NS}:journal`` (the snapshot then covers this batch too);
6. ``HSET {NS}:meta`` with absolute counter values (idempotent);
7. ``XACK`` of every consumed input entry, then ``XDEL`` of the same ids.

Trimming the inputs: the worker's group is the only reader of ``{NS}:items`` and
``{NS}:answers`` by contract, so an entry the group has acknowledged is finished; deleting
exactly the acknowledged ids in the same transaction keeps Redis memory flat without ever
removing an entry some consumer still holds pending. Output streams are capped with
approximate ``MAXLEN`` (settings ``questions_maxlen``, ``decisions_maxlen``,
``dead_maxlen``): a reader that falls further behind than the cap loses the oldest entries
(a lost question is simply re-issued after the question timeout).
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import msgpack
import redis

from ..core.types import Question, Record
from ..keys import MAX_PACK_ANSWERS, Keys
from .codec import Dead

Command = tuple[Any, ...]

_packb = msgpack.Packer(use_bin_type=True).pack


def assign_value(r: Record) -> bytes:
    """The documented ``{NS}:assign`` value: a msgpack map."""
    return _packb({"side": r.side, "status": r.status, "llr": float(r.llr),
                   "answers": int(r.answers), "rev": int(r.rev), "pinned": bool(r.pinned)})


@dataclass(frozen=True)
class Caps:
    """Approximate MAXLEN caps of the output streams (0 = uncapped)."""

    questions: int = 100_000
    decisions: int = 100_000
    dead: int = 100_000
    history: int = 10_000


def _xadd(key: str, cap: int, fields: Iterable[Any]) -> Command:
    if cap:
        return ("XADD", key, "MAXLEN", "~", cap, "*", *fields)
    return ("XADD", key, "*", *fields)


@dataclass
class CommitPlan:
    """The commands of one batch's transaction, built before anything is sent."""

    commands: list[Command] = field(default_factory=list)

    def __len__(self) -> int:
        return len(self.commands)


def build_commit(
    keys: Keys,
    caps: Caps,
    *,
    records: Sequence[Record],
    decisions: Sequence[Record],
    questions: Sequence[Question],
    dead: Sequence[Dead],
    journal: bytes | None,
    snapshot: bytes | None,
    meta: Mapping[str, Any],
    acks: Mapping[str, Sequence[bytes]],
    group: str,
    pack_questions: bool,
    epoch: str | None = None,
) -> CommitPlan:
    """All commands of a batch's MULTI/EXEC, in the documented order."""
    cmds: list[Command] = []
    if epoch is not None:
        cmds.append(("SET", keys.epoch, epoch))
    if records:
        flat: list[Any] = []
        for r in records:
            flat.append(r.key)
            flat.append(assign_value(r))
        cmds.append(("HSET", keys.assign, *flat))
    for r in decisions:
        cmds.append(_xadd(keys.decisions, caps.decisions, (
            "key", r.key, "side", "" if r.side is None else r.side, "status", r.status,
            "llr", repr(float(r.llr)), "answers", int(r.answers), "rev", int(r.rev))))
    if questions:
        if pack_questions:
            for i in range(0, len(questions), MAX_PACK_ANSWERS):
                rows = [{"qid": q.qid, "a": q.a, "b": q.b, "why": q.why, "ts": q.ts_ms}
                        for q in questions[i:i + MAX_PACK_ANSWERS]]
                cmds.append(_xadd(keys.questions, caps.questions, ("pack", _packb(rows))))
        else:
            qk, cap = keys.questions, caps.questions
            for q in questions:
                cmds.append(_xadd(qk, cap, ("qid", q.qid, "a", q.a, "b", q.b, "why", q.why,
                                            "ts", q.ts_ms)))
    for d in dead:
        flat = []
        for k, v in d.to_fields().items():
            flat.append(k)
            flat.append(v)
        cmds.append(_xadd(keys.dead, caps.dead, flat))
    if snapshot is not None:
        cmds.append(("SET", keys.snapshot, snapshot))
        cmds.append(("DEL", keys.journal))
    elif journal is not None:
        cmds.append(("XADD", keys.journal, "*", "b", journal))
    if meta:
        flat = []
        for k, v in meta.items():
            flat.append(k)
            flat.append(v)
        cmds.append(("HSET", keys.meta, *flat))
    for stream, ids in acks.items():
        if ids:
            cmds.append(("XACK", stream, group, *ids))
            cmds.append(("XDEL", stream, *ids))
    return CommitPlan(cmds)


def execute(client: redis.Redis, plan: CommitPlan) -> list[Any]:
    """Send the plan as one MULTI/EXEC; raises on any command error (nothing applied).

    Command errors inside MULTI (wrong type, ...) are reported by Redis at EXEC time and
    abort nothing by themselves, so any error reply is raised: the caller treats the
    state as unknown and reloads it from Redis.
    """
    pipe = client.pipeline(transaction=True)
    for cmd in plan.commands:
        pipe.execute_command(*cmd)
    return pipe.execute(raise_on_error=True)
