"""The worker's replayable state: the engine plus what the worker itself must remember.

Everything here is rebuilt exactly by ``snapshot + journal replay``:

- the engine (``Engine.snapshot`` / ``Engine.restore``; deterministic, so replaying the
  journaled calls reproduces the same records, qids and questions);
- ``seq``: the number of the last committed batch (journal entries carry theirs; replay
  skips any entry not newer than the snapshot, so a stray repeat can never double-apply);
- the window of recent ``aid`` values (bounded, FIFO; the journal lists the aids each
  batch accepted, so replay rebuilds the window exactly);
- (the side/status last published per item lives in the engine: ``take_updates``);
- counters (dead letters by reason, duplicates by kind, ...), journaled as per-batch deltas.
"""

from __future__ import annotations

from collections import Counter, OrderedDict
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import msgpack
import numpy as np
import zstandard

from ..core.engine import Engine
from ..core.packing import msgpack_pieces
from ..core.types import Answer, AnswerColumns, EngineConfig, KeyRowAnswers
from ..errors import EngineInputError, StateError

SNAPSHOT_VERSION = 1
JOURNAL_VERSION = 1
DEFAULT_AID_WINDOW = 100_000

# ops in a journal entry, in the order they were applied
OP_ITEMS = "i"
OP_ANSWERS = "a"  # payload: one [a, b, same, source, qid] row per answer
OP_ANSWER_COLUMNS = "A"  # payload: [a-list, b-list, same-list, source-list, qid-list]
# payload: [key width, a rows, b rows (bytes), same (bytes of 0/1), source-list, qids (bytes
# of little-endian int64)]: KeyRowAnswers, as the column packs of keys of one length came.
# Written by versions before 2026-12-04; still read.
OP_KEY_ROWS = "K"
# The same answers with the key bytes column by column (byte j of every key, then byte j +
# 1) and each qid as its difference from the one before: keys that share a prefix and qids
# that count up then give zstd long runs, so it compresses in a third of the time to two
# thirds of the size (bench: 0.53 against 1.47 ms, 6.0 against 9.2 bytes an answer, for
# 20,000 answers with keys of 12 bytes).
OP_KEY_COLUMNS = "k"
# Answers that each name an issued qid and hold its question's keys as shown (the usual
# batch, plain or packed: ``Intake.by_qid``), by their qids alone; replay takes the keys
# from the question table, which the snapshot and the journal before rebuild as they were.
# payload: [first qid, step width in bytes (1, 2, 4 or 8), the other qids as steps (bytes,
# little-endian signed: each qid less the one before), same (bytes of 0/1), source table
# (names), code width (1 or 2), codes (bytes: each answer's source as a position in the
# table)].
OP_QIDS = "q"

# Journal entries from this size on are stored zstd-compressed (level 1): a column pack's
# entry shrinks about ten times (41 to 4.2 bytes per answer as op k, 6.7 as op K, in
# bench_batch's packed run; op q, the usual form since, takes 0.94), so the journal
# reaches the size that calls for a snapshot that much later, and a snapshot is a pause.
# Readers tell the two forms apart by zstd's frame magic, which no msgpack map starts with.
JOURNAL_COMPRESS_FROM = 4096
ZSTD_MAGIC = b"\x28\xb5\x2f\xfd"
_JOURNAL_ZSTD = zstandard.ZstdCompressor(level=1)  # the worker's thread only


class AidWindow:
    """The most recent ``capacity`` accepted aids; older ones are forgotten (FIFO)."""

    def __init__(self, capacity: int = DEFAULT_AID_WINDOW) -> None:
        self.capacity = capacity
        self._seen: OrderedDict[str, None] = OrderedDict()

    def __contains__(self, aid: str) -> bool:
        return aid in self._seen

    def __len__(self) -> int:
        return len(self._seen)

    def add(self, aid: str) -> None:
        seen = self._seen
        seen[aid] = None
        if len(seen) > self.capacity:
            seen.popitem(last=False)

    def extend(self, aids: Iterable[str]) -> None:
        for aid in aids:
            self.add(aid)

    def items(self) -> list[str]:
        return list(self._seen)


@dataclass
class Batch:
    """What one batch applied: the journal entry's content, plus what to publish."""

    seq: int
    now_ms: int
    ops: list[list[Any]] = field(default_factory=list)  # [[op, payload], ...]
    aids: list[str] = field(default_factory=list)
    counts: Counter[str] = field(default_factory=Counter)
    extra: int | None = None  # records left over it published besides its own (None: all)

    def journal_bytes(self) -> bytes:
        data = msgpack.packb(
            {"v": JOURNAL_VERSION, "s": self.seq, "t": self.now_ms, "ops": self.ops,
             "aids": self.aids, "c": dict(self.counts),
             **({"e": self.extra} if self.extra is not None else {})},
            use_bin_type=True,
        )
        return data if len(data) < JOURNAL_COMPRESS_FROM else _JOURNAL_ZSTD.compress(data)

    @staticmethod
    def from_journal(data: bytes) -> Batch:
        if data[:4] == ZSTD_MAGIC:
            try:
                data = zstandard.ZstdDecompressor().decompress(data)
            except zstandard.ZstdError as exc:
                raise StateError(f"journal entry does not decompress: {exc}") from None
        m = msgpack.unpackb(data, raw=False)
        if m.get("v") != JOURNAL_VERSION:
            raise StateError(f"journal entry has version {m.get('v')!r}; "
                             f"this worker reads version {JOURNAL_VERSION}")
        extra = m.get("e")
        return Batch(int(m["s"]), int(m["t"]), m["ops"], m["aids"], Counter(m["c"]),
                     None if extra is None else int(extra))


def answers_payload(answers: Sequence[Answer]) -> list[list[Any]]:
    return [[x.a, x.b, x.same, x.source, x.qid] for x in answers]


def answers_columns_payload(cols: AnswerColumns) -> list[list[Any]]:
    return [cols.a, cols.b, cols.same, cols.source, cols.qid]


def key_rows_payload(k: KeyRowAnswers) -> list[Any]:
    return [k.a_rows.shape[1], k.a_rows.tobytes(), k.b_rows.tobytes(),
            k.same.astype(np.uint8).tobytes(), list(k.source), k.qn.astype("<i8").tobytes()]


def key_rows_from_payload(payload: Sequence[Any]) -> KeyRowAnswers:
    width, a, b, same, source, qn = payload
    return KeyRowAnswers(np.frombuffer(a, dtype=np.uint8).reshape(-1, width),
                         np.frombuffer(b, dtype=np.uint8).reshape(-1, width),
                         np.frombuffer(same, dtype=np.uint8).astype(bool), list(source),
                         np.frombuffer(qn, dtype="<i8").astype(np.int64))


def key_columns_payload(k: KeyRowAnswers) -> list[Any]:
    """The payload of :data:`OP_KEY_COLUMNS` (read back by :func:`key_columns_from_payload`)."""
    steps = np.diff(np.asarray(k.qn, dtype=np.int64), prepend=np.int64(0))
    return [k.a_rows.shape[1], k.a_rows.T.tobytes(), k.b_rows.T.tobytes(),
            k.same.astype(np.uint8).tobytes(), list(k.source), steps.astype("<i8").tobytes()]


def key_columns_from_payload(payload: Sequence[Any]) -> KeyRowAnswers:
    width, a, b, same, source, steps = payload
    return KeyRowAnswers(
        np.ascontiguousarray(np.frombuffer(a, dtype=np.uint8).reshape(width, -1).T),
        np.ascontiguousarray(np.frombuffer(b, dtype=np.uint8).reshape(width, -1).T),
        np.frombuffer(same, dtype=np.uint8).astype(bool), list(source),
        np.cumsum(np.frombuffer(steps, dtype="<i8"), dtype=np.int64))


def _narrowest(values: np.ndarray) -> str:
    """The smallest little-endian signed integer dtype that holds ``values``."""
    lo, hi = (int(values.min()), int(values.max())) if len(values) else (0, 0)
    for dtype in ("<i1", "<i2", "<i4"):
        info = np.iinfo(dtype)
        if info.min <= lo and hi <= info.max:
            return dtype
    return "<i8"


def qids_payload(qn: np.ndarray, same: np.ndarray, src: np.ndarray,
                 source_names: Sequence[str]) -> list[Any]:
    """The payload of :data:`OP_QIDS` (read back by :func:`qids_from_payload`)."""
    qn = np.asarray(qn, dtype=np.int64)
    first = int(qn[0]) if len(qn) else 0
    steps = np.diff(qn)  # each qid less the one before: mostly 1 in a batch
    width = _narrowest(steps)
    # the sources present, in id order, and each answer's place among them: what
    # np.unique(src, return_inverse=True) gives, without its sort (ids are small)
    present = np.bincount(src, minlength=1) > 0
    ids = np.flatnonzero(present)
    codes = (np.cumsum(present) - 1)[src]
    table = [source_names[i] for i in ids.tolist()]
    code_width = 1 if len(table) <= 256 else 2
    return [first, int(width[2]), steps.astype(width).tobytes(),
            np.asarray(same, dtype=np.uint8).tobytes(), table, code_width,
            codes.astype("<u1" if code_width == 1 else "<u2").tobytes()]


def qids_from_payload(payload: Sequence[Any]) -> tuple[np.ndarray, np.ndarray, list[str]]:
    """(qids, same flags, source names) of an :data:`OP_QIDS` payload."""
    first, width, steps, same, table, code_width, codes = payload
    flags = np.frombuffer(same, dtype=np.uint8).astype(bool)
    qn = np.empty(len(flags), dtype=np.int64)
    if len(qn):
        qn[0] = first
        np.cumsum(np.frombuffer(steps, dtype=f"<i{width}"), dtype=np.int64, out=qn[1:])
        qn[1:] += first
    at = np.frombuffer(codes, dtype="<u1" if code_width == 1 else "<u2")
    return qn, flags, list(map(table.__getitem__, at.tolist()))


def answers_from_payload(rows: Sequence[Sequence[Any]]) -> list[Answer]:
    return [Answer(r[0], r[1], bool(r[2]), r[3], r[4]) for r in rows]


class WorkerState:
    """The engine plus the worker's own replayable memory."""

    def __init__(self, engine: Engine, epoch: str, aid_window: int = DEFAULT_AID_WINDOW
                 ) -> None:
        self.engine = engine
        self.epoch = epoch
        self.seq = 0
        self.aids = AidWindow(aid_window)
        self.counters: Counter[str] = Counter()
        # what this state was loaded from, as it lies in Redis: the snapshot's bytes and
        # the journal's replayed on top of it (the worker's journal bound counts both)
        self.snapshot_size = 0
        self.journal_size = 0

    # -- applying -----------------------------------------------------------------------
    def apply_items(self, items: list[tuple[str, str | None]]) -> list[str]:
        return self.engine.add_items(items)

    def apply_answers(self, answers: list[Answer], now_ms: int) -> list[str]:
        return self.engine.add_answers(answers, now_ms)

    def apply_answer_columns(self, cols: AnswerColumns | KeyRowAnswers, now_ms: int) -> Any:
        return self.engine.add_answer_columns(cols, now_ms)

    def replay(self, batch: Batch) -> None:
        """Re-run one journaled batch; its questions and records are not published again."""
        if batch.seq <= self.seq:
            return  # already covered by the snapshot or a previous entry
        for op, payload in batch.ops:
            try:
                self._replay_op(op, payload, batch.now_ms)
            except (EngineInputError, ValueError, TypeError, KeyError, IndexError) as exc:
                # a committed entry applied once; if it no longer does, the snapshot and the
                # journal do not belong together (or the entry is damaged)
                raise StateError(f"journal entry {batch.seq} does not apply to the state "
                                 f"before it (op {op!r}: {exc})") from None
        self.engine.plan_columns(batch.now_ms)
        self.engine.take_update_columns(batch.extra)  # the same records as it published
        self.finish(batch)

    def _replay_op(self, op: str, payload: Any, now_ms: int) -> None:
        engine = self.engine
        if op == OP_ITEMS:
            engine.add_items([(k, s) for k, s in payload])
        elif op == OP_ANSWER_COLUMNS:
            a, b, same, source, qid = payload
            engine.add_answer_columns(AnswerColumns(a, b, same, source, qid), now_ms)
        elif op == OP_QIDS:
            engine.add_answers_by_qid(*qids_from_payload(payload), now_ms)
        elif op == OP_KEY_COLUMNS:
            engine.add_answer_columns(key_columns_from_payload(payload), now_ms)
        elif op == OP_KEY_ROWS:
            engine.add_answer_columns(key_rows_from_payload(payload), now_ms)
        elif op == OP_ANSWERS:
            engine.add_answers(answers_from_payload(payload), now_ms)
        else:
            raise ValueError("an unknown op (written by a newer version?)")

    def finish(self, batch: Batch) -> None:
        """Fold a committed (or replayed) batch into the worker's memory."""
        self.seq = batch.seq
        self.aids.extend(batch.aids)
        self.counters.update(batch.counts)

    # -- snapshots ----------------------------------------------------------------------
    def snapshot_bytes(self, now_ms: int) -> bytes:
        return b"".join(msgpack_pieces(  # (the engine's part is large: joined, not packed)
            {"v": SNAPSHOT_VERSION, "epoch": self.epoch, "seq": self.seq, "t": now_ms,
             "engine": self.engine.snapshot(), "aids": self.aids.items(),
             "counters": dict(self.counters)}))

    @staticmethod
    def from_snapshot(data: bytes, epoch: str, aid_window: int) -> WorkerState:
        try:
            m = msgpack.unpackb(data, raw=False, strict_map_key=False)
        except Exception as exc:  # noqa: BLE001 - any decoding failure means the same
            raise StateError(f"the snapshot cannot be decoded ({type(exc).__name__})"
                             ) from None
        if not isinstance(m, dict) or m.get("v") != SNAPSHOT_VERSION:
            raise StateError("the snapshot has an unknown format or version")
        if m["epoch"] != epoch:
            raise StateError(f"the snapshot belongs to epoch {m['epoch']!r}, but the "
                             f"namespace's epoch is {epoch!r}: the state is inconsistent")
        st = WorkerState(Engine.restore(m["engine"]), epoch, aid_window)
        st.snapshot_size = len(data)
        st.seq = int(m["seq"])
        st.aids.extend(m["aids"])
        st.counters.update(m["counters"])
        return st

    @staticmethod
    def fresh(config: EngineConfig, epoch: str, aid_window: int) -> WorkerState:
        return WorkerState(Engine(config), epoch, aid_window)

    def meta_fields(self) -> Mapping[str, int | str]:
        """Absolute counter values for ``{NS}:meta`` (idempotent to write)."""
        out: dict[str, int | str] = {"seq": self.seq, "epoch": self.epoch}
        for k, v in self.counters.items():
            out[k] = v
        return out
