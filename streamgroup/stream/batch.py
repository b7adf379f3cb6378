"""Processing one batch of entries purely: decode, filter, apply to the engine, plan.

No I/O here: the worker hands in the entries it read and gets back everything the commit
needs. The engine is mutated; the caller either commits the result or throws the whole
in-memory state away and reloads it from Redis.
"""

from __future__ import annotations

from collections import Counter
from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np

from ..core.types import (
    APPLIED,
    Answer,
    AnswerColumns,
    KeyRowAnswers,
    QuestionColumns,
    RecordColumns,
)
from ..errors import EngineInputError
from .codec import (
    ENGINE,
    UNKNOWN_QID,
    Dead,
    Decoded,
    Entry,
    Ref,
    answer_fields,
    decode_answers,
    decode_items,
    origin,
)
from .state import (
    OP_ANSWER_COLUMNS,
    OP_ANSWERS,
    OP_ITEMS,
    OP_KEY_COLUMNS,
    OP_QIDS,
    Batch,
    WorkerState,
    answers_columns_payload,
    answers_payload,
    key_columns_payload,
    qids_payload,
)


@dataclass
class Outcome:
    """Everything a processed batch hands to the commit and the metrics."""

    batch: Batch
    records: RecordColumns | None = None  # every record that changed
    decisions: list[int] = field(default_factory=list)  # positions in records: side/status moved
    questions: QuestionColumns = field(default_factory=QuestionColumns.empty)
    dead: list[tuple[str, Dead]] = field(default_factory=list)  # (input stream, letter)
    counts: Counter[str] = field(default_factory=Counter)


def _engine_kind(reason: str) -> str:
    return UNKNOWN_QID if "qid" in reason else ENGINE


def _apply_items(state: WorkerState, items: list[tuple[str, str | None]],
                 origins: Sequence[Ref], stream: str, out: Outcome) -> None:
    counts = out.counts
    try:
        results = state.apply_items(items)
        out.batch.ops.append([OP_ITEMS, [[k, s] for k, s in items]])
    except EngineInputError:
        # Some item is bad (or clashes with another one of this batch): apply one at a
        # time so the good ones still go in and each bad one gets its own reason.
        results = []
        for (key, side), ref in zip(items, origins, strict=True):
            reason = state.engine.validate_item(key, side)
            if reason is None:
                try:
                    results.extend(state.apply_items([(key, side)]))
                    out.batch.ops.append([OP_ITEMS, [[key, side]]])
                    continue
                except EngineInputError as exc:
                    reason = str(exc)
            fields = {"key": key} if side is None else {"key": key, "side": side}
            out.dead.append((stream, Dead(fields, reason, ENGINE, origin(stream, ref))))
            counts["dead:" + ENGINE] += 1
    applied = sum(1 for r in results if r == APPLIED)
    counts["items_applied"] += applied
    counts["dup:item"] += len(results) - applied


def _apply_answers(state: WorkerState, cols: AnswerColumns | KeyRowAnswers,
                   aids: list[str | None], origins: Sequence[Ref], stream: str, now_ms: int,
                   out: Outcome) -> None:
    counts, batch = out.counts, out.batch
    window = state.aids
    if aids.count(None) != len(aids):  # some answer carries an aid
        keep: list[int] = []
        fresh: set[str] = set()
        for pos, aid in enumerate(aids):
            if aid is not None:
                if aid in fresh or aid in window:
                    counts["dup:aid"] += 1
                    continue
                fresh.add(aid)
            keep.append(pos)
        if len(keep) < len(aids):
            cols = cols.select(keep)
            aids = [aids[k] for k in keep]
            origins = [origins[k] for k in keep]
    if not len(cols):
        return
    try:
        applied = state.apply_answer_columns(cols, now_ms)
        got = state.engine.last_intake
        if got is not None and got.by_qid and got.src is not None:
            batch.ops.append([OP_QIDS, qids_payload(got.qn, got.same, got.src,
                                                    state.engine.source_names)])
        elif isinstance(cols, KeyRowAnswers):
            batch.ops.append([OP_KEY_COLUMNS, key_columns_payload(cols)])
        else:
            batch.ops.append([OP_ANSWER_COLUMNS, answers_columns_payload(cols)])
        batch.aids.extend(a for a in aids if a is not None)
    except EngineInputError:
        good: list[tuple[Answer, str | None, Ref]] = []
        for ans, aid, ref in zip(cols.rows(), aids, origins, strict=True):
            reason = state.engine.validate_answer(ans)
            if reason is None:
                good.append((ans, aid, ref))
            else:
                _dead_answer(out, stream, ans, aid, ref, reason)
        answers, results = _apply_good(state, good, stream, now_ms, out)
        cols = AnswerColumns.of(answers)
        applied = np.array([r == APPLIED for r in results], dtype=bool)
    n_applied = int(applied.sum())
    if n_applied:
        counts["applied"] += n_applied
    if n_applied < len(applied):
        dup = ~applied
        with_qid = np.fromiter((q is not None for q in cols.qid), dtype=bool, count=len(cols))
        counts["dup:qid"] += int((dup & with_qid).sum())
        counts["dup:pair_source"] += int((dup & ~with_qid).sum())


def _dead_answer(out: Outcome, stream: str, ans: Answer, aid: str | None, ref: Ref,
                 reason: str) -> None:
    kind = _engine_kind(reason)
    out.dead.append((stream, Dead(answer_fields(ans, aid), reason, kind, origin(stream, ref))))
    out.counts["dead:" + kind] += 1


def _apply_good(state: WorkerState, good: list[tuple[Answer, str | None, Ref]], stream: str,
                now_ms: int, out: Outcome) -> tuple[list[Answer], list[str]]:
    """Apply answers that each passed validation: as one call, or one by one if the engine
    still refuses the lot (a limit only the whole batch crosses, such as the number of
    sources); an answer refused alone becomes a dead letter, so no batch can jam the worker.
    """
    batch = out.batch
    answers = [g[0] for g in good]
    if not answers:
        return [], []
    try:
        results = state.apply_answers(answers, now_ms)
        batch.ops.append([OP_ANSWERS, answers_payload(answers)])
        batch.aids.extend(g[1] for g in good if g[1] is not None)
        return answers, results
    except EngineInputError:
        pass
    applied: list[Answer] = []
    results = []
    for ans, aid, ref in good:
        try:
            results.extend(state.apply_answers([ans], now_ms))
        except EngineInputError as exc:
            _dead_answer(out, stream, ans, aid, ref, str(exc))
            continue
        batch.ops.append([OP_ANSWERS, answers_payload([ans])])
        if aid is not None:
            batch.aids.append(aid)
        applied.append(ans)
    return applied, results


def _decoded(out: Outcome, kind: str, stream: str, entries: list[Entry], dec: Decoded
             ) -> Decoded:
    """Count a decoded part of the batch and collect its dead letters."""
    counts = out.counts
    counts["entries:" + kind] += len(entries)
    counts["missing"] += dec.missing
    for d in dec.dead:
        out.dead.append((stream, d))
        counts["dead:" + d.kind] += 1
    return dec


# Records left over that a batch publishes beside every record its own input changed, at
# the least. After the sources are re-learnt, the engine looks at every item again and may
# decide thousands at once (8,700 decisions in one batch of a plain drain over 200,000
# items, whose transaction held Redis for 39 ms while lookups waited); such a wave is left
# over and goes out a little with each batch, a fraction of a second late.
PUBLISH_EXTRA = 64


def publish_extra(answers: int, items: int, questions: int) -> int:
    """How many records left over a batch publishes besides its own: ``PUBLISH_EXTRA``
    and a quarter as many again as its answers, questions and items (so that a wave
    costs a transaction about a quarter more, whatever the size of the batches: a few
    hundred records a plain batch, thousands a packed one)."""
    return PUBLISH_EXTRA + (answers + questions + items) // 4


def process(state: WorkerState, items_stream: str, items: list[Entry],
            answers_stream: str, answers: list[Entry], now_ms: int) -> Outcome:
    """Apply one batch (items before answers), plan, and collect what must be committed."""
    out = Outcome(Batch(state.seq + 1, now_ms))
    counts = out.counts
    answered = added = 0
    if items:
        di = _decoded(out, "items", items_stream, items, decode_items(items_stream, items))
        if di.items:
            added = len(di.items)
            _apply_items(state, di.items, di.origins, items_stream, out)
    if answers:
        da = _decoded(out, "answers", answers_stream, answers,
                      decode_answers(answers_stream, answers))
        got = da.keyed if da.keyed is not None else da.cols
        answered = len(got)
        if len(got):
            _apply_answers(state, got, da.aids, da.origins, answers_stream, now_ms, out)
    out.questions = state.engine.plan_columns(now_ms)
    out.batch.extra = publish_extra(answered, added, len(out.questions))
    out.records, moved = state.engine.take_update_columns(out.batch.extra)
    for k in [k for k, v in counts.items() if not v]:
        del counts[k]
    out.batch.counts = counts
    state.finish(out.batch)
    out.decisions = moved
    return out
