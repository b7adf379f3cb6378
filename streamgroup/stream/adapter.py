"""A crowd adapter for the simulated crowd, speaking the stream contract.

It reads ``{NS}:questions`` with its own consumer group (plain or packed entries), asks
:class:`~streamgroup.sim.crowd.Crowd` and writes the answers to ``{NS}:answers`` with the
``qid`` (one entry per answer, or packed). Used by the integration tests and the stream
benchmark; a real adapter would show people ``a`` and ``b`` instead.
"""

from __future__ import annotations

from typing import Any

import msgpack
import redis

from ..core.types import Question
from ..keys import MAX_PACK_ANSWERS, Keys, question_pack_rows
from ..sim.crowd import Crowd

ADAPTER_GROUP = "sim-crowd"


class SimAdapter:
    """Answers every question it reads, at once, through the streams."""

    def __init__(self, client: redis.Redis, ns: str, crowd: Crowd, *, pack: bool = False,
                 group: str = ADAPTER_GROUP, consumer: str = "sim-1", count: int = 5000,
                 aid_prefix: str | None = None, columns: bool = False) -> None:
        self.client = client
        self.keys = Keys(ns)
        self.crowd = crowd
        self.pack = pack
        self.group = group
        self.consumer = consumer
        self.count = count
        self.aid_prefix = aid_prefix
        self.columns = columns  # packed answers as column packs (a map of arrays)
        self.written = 0
        self.qids: list[str] = []
        self._ready = False

    def _ensure_group(self) -> None:
        if self._ready:
            return
        try:
            self.client.xgroup_create(self.keys.questions, self.group, id="0", mkstream=True)
        except redis.ResponseError as exc:
            if "BUSYGROUP" not in str(exc):
                raise
        self._ready = True

    def read(self, block_ms: int | None = None) -> list[Question]:
        self._ensure_group()
        reply = self.client.xreadgroup(self.group, self.consumer, {self.keys.questions: ">"},
                                       count=self.count, block=block_ms)
        out: list[Question] = []
        for _name, entries in reply or ():
            ids = []
            for eid, fields in entries:
                ids.append(eid)
                pack = fields.get(b"pack")
                if pack is not None:
                    out.extend(Question(str(m["qid"]), m["a"], m["b"], m["why"], int(m["ts"]))
                               for m in question_pack_rows(pack))
                else:
                    out.append(Question(fields[b"qid"].decode(), fields[b"a"].decode(),
                                        fields[b"b"].decode(), fields[b"why"].decode(),
                                        int(fields[b"ts"])))
            if ids:
                self.client.xack(self.keys.questions, self.group, *ids)
        return out

    def answer(self, questions: list[Question]) -> int:
        """Write the crowd's answers to ``questions``; returns how many were written."""
        if not questions:
            return 0
        answers = self.crowd.answer_now(questions)
        pipe = self.client.pipeline(transaction=False)
        key = self.keys.answers
        n0 = self.written
        if self.pack and self.columns:
            for i in range(0, len(answers), MAX_PACK_ANSWERS):
                part = answers[i:i + MAX_PACK_ANSWERS]
                cols: dict[str, list[Any]] = {
                    "a": [a.a for a in part], "b": [a.b for a in part],
                    "same": [a.same for a in part], "source": [a.source for a in part],
                    "qid": [a.qid for a in part]}
                if self.aid_prefix is not None:
                    cols["aid"] = [f"{self.aid_prefix}{n0 + i + j}" for j in range(len(part))]
                pipe.xadd(key, {"pack": msgpack.packb(cols, use_bin_type=True)})
        elif self.pack:
            for i in range(0, len(answers), MAX_PACK_ANSWERS):
                rows: list[dict[str, Any]] = []
                for j, a in enumerate(answers[i:i + MAX_PACK_ANSWERS]):
                    m: dict[str, Any] = {"a": a.a, "b": a.b, "same": a.same, "qid": a.qid}
                    if a.source:
                        m["source"] = a.source
                    if self.aid_prefix is not None:
                        m["aid"] = f"{self.aid_prefix}{n0 + i + j}"
                    rows.append(m)
                pipe.xadd(key, {"pack": msgpack.packb(rows, use_bin_type=True)})
        else:
            for j, a in enumerate(answers):
                f = {"a": a.a, "b": a.b, "same": "1" if a.same else "0", "qid": a.qid or ""}
                if a.source:
                    f["source"] = a.source
                if self.aid_prefix is not None:
                    f["aid"] = f"{self.aid_prefix}{n0 + j}"
                pipe.xadd(key, f)
        pipe.execute()
        self.written += len(answers)
        self.qids.extend(q.qid for q in questions)
        return len(answers)

    def step(self, block_ms: int | None = None) -> int:
        return self.answer(self.read(block_ms))
