"""Every key, stream, group and limit of the wire contract, in one place.

All keys of one deployment share the namespace written as a Redis hash tag,
``{NS}:...``, so a single MULTI/EXEC may touch all of them, also on Redis Cluster.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from typing import Any

import msgpack
import numpy as np

DEFAULT_NS = "sg"

# Limits of the contract.
MAX_KEY_BYTES = 256  # item keys: 1..256 bytes of UTF-8, no control characters
MAX_SOURCE_BYTES = 128  # source ids: 1..128 bytes
MAX_LABEL_BYTES = 64  # side labels
MAX_ID_BYTES = 128  # qid and aid
MAX_PACK_BYTES = 1 << 20  # a packed entry's msgpack payload: at most 1 MiB
MAX_PACK_ANSWERS = 10_000  # a packed entry holds at most this many answers

GROUP = "streamgroup"  # the worker's consumer group on the input streams

STATUS_WAITING = "waiting"
STATUS_ASKING = "asking"
STATUS_PLACED = "placed"
STATUS_UNRESOLVED = "unresolved"
STATUSES = (STATUS_WAITING, STATUS_ASKING, STATUS_PLACED, STATUS_UNRESOLVED)

WHY_SEED = "seed"
WHY_PLACE = "place"
WHY_CHECK = "check"
WHYS = (WHY_SEED, WHY_PLACE, WHY_CHECK)

# Control characters (Unicode category Cc: C0, DEL, C1), which no key, id or label may hold.
CONTROL_CHARS = re.compile("[\x00-\x1f\x7f-\x9f]")
_CONTROL_BUT_NUL = re.compile("[\x01-\x1f\x7f-\x9f]")


def has_control(text: str | bytes, nul_ok: bool = False) -> bool:
    """Whether ``text`` (str, or UTF-8 bytes) holds a control character; NUL is allowed
    when ``nul_ok`` (a separator of joined fields).

    ASCII text, the usual case, is checked with numpy over its bytes (about 100 times
    faster than the regex on a batch of keys); other text with the regex.
    """
    if isinstance(text, str):
        if not text.isascii():
            return (_CONTROL_BUT_NUL if nul_ok else CONTROL_CHARS).search(text) is not None
        text = text.encode("ascii")
    elif not text.isascii():
        return has_control(text.decode("utf-8", "replace"), nul_ok)
    if not text:
        return False
    a = np.frombuffer(text, dtype=np.uint8)
    if int(a.max()) == 0x7F:  # DEL (ASCII: nothing is above it)
        return True
    if not nul_ok:
        return int(a.min()) < 0x20
    low = a < 0x20
    return bool(low.any()) and np.count_nonzero(low) != np.count_nonzero(a == 0)

_NS_RE = re.compile(r"^[A-Za-z0-9_.\-]{1,64}$")


def valid_namespace(ns: str) -> bool:
    """True when ``ns`` can be used as a namespace (letters, digits, ``_.-``)."""
    return bool(_NS_RE.match(ns))


@dataclass(frozen=True)
class Keys:
    """The Redis keys of one namespace."""

    ns: str = DEFAULT_NS

    def _k(self, name: str) -> str:
        return "{" + self.ns + "}:" + name

    # streams and hashes of the public contract
    @property
    def items(self) -> str:
        return self._k("items")

    @property
    def answers(self) -> str:
        return self._k("answers")

    @property
    def questions(self) -> str:
        return self._k("questions")

    @property
    def decisions(self) -> str:
        return self._k("decisions")

    @property
    def assign(self) -> str:
        return self._k("assign")

    @property
    def dead(self) -> str:
        return self._k("dead")

    # the worker's private state (readers should not rely on these)
    @property
    def epoch(self) -> str:
        """String: the deployment epoch, written once when the state is created."""
        return self._k("epoch")

    @property
    def snapshot(self) -> str:
        """String: the last engine snapshot (msgpack)."""
        return self._k("snapshot")

    @property
    def snapshot_seq(self) -> str:
        """String: the batch number the stored snapshot covers (guards against an older
        snapshot landing over a newer one)."""
        return self._k("snapseq")

    @property
    def snapshot_next(self) -> str:
        """String: a snapshot on its way in (renamed to ``snapshot`` by the same
        transaction, or dropped if an older one)."""
        return self._k("snapnext")

    @property
    def journal(self) -> str:
        """Stream: the batches applied since the last snapshot, for replay."""
        return self._k("journal")

    @property
    def meta(self) -> str:
        """Hash: counters and summaries for ``status`` and metrics."""
        return self._k("meta")

    @property
    def noise(self) -> str:
        """Hash: learned reliability per source (msgpack values)."""
        return self._k("noise")

    @property
    def history(self) -> str:
        """Stream: periodic progress samples used by the report."""
        return self._k("history")

    @property
    def lease(self) -> str:
        """String: which worker process holds the namespace (expires unless renewed)."""
        return self._k("lease")

    def all(self) -> list[str]:
        return [
            self.items, self.answers, self.questions, self.decisions, self.assign,
            self.dead, self.epoch, self.snapshot, self.snapshot_seq, self.snapshot_next,
            self.journal, self.meta, self.noise, self.history, self.lease,
        ]


QUESTION_FIELDS = ("qid", "a", "b", "why", "ts")  # the fields of one question


def question_pack_rows(payload: bytes) -> list[dict[str, Any]]:
    """The questions of a packed ``{NS}:questions`` entry, as maps: the ``pack`` value is a
    msgpack array of maps, or (worker setting ``question_columns``) a map of arrays."""
    data = msgpack.unpackb(payload, raw=False)
    if isinstance(data, dict):
        cols = [data[k] for k in QUESTION_FIELDS]
        return [dict(zip(QUESTION_FIELDS, row, strict=True)) for row in zip(*cols, strict=True)]
    return list(data)
