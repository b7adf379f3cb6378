"""Decoding and validation of input stream entries, and the dead letters for bad ones.

Entries arrive as ``(entry_id, {field: value})`` with bytes on both sides (the worker reads
with ``decode_responses=False`` so that a producer's invalid UTF-8 becomes a dead letter
instead of an exception inside the client library).

Rules (see the contract in the README):

- ``{NS}:items``: ``key`` (1-256 bytes of UTF-8, no control characters) and an optional
  ``side`` (1-64 bytes, same character rules). Unknown extra fields are ignored.
- ``{NS}:answers``: ``a``, ``b`` (item keys, a != b), ``same`` (``1`` or ``0``), optional
  ``source`` (1-128 bytes), ``qid`` and ``aid`` (1-128 bytes each). Or a single field
  ``pack``: a msgpack array of maps with those keys (``same`` may then be 0/1 or a bool),
  or a column pack: a msgpack map of those keys to arrays of one length (``a``, ``b`` and
  ``same`` required; nil in ``source``, ``qid`` or ``aid`` means absent for that answer).

Packed entries have hard limits: the payload is at most ``MAX_PACK_BYTES`` (1 MiB) and
holds at most ``MAX_PACK_ANSWERS`` (10,000) answers; the depth is fixed at two (an array
of maps whose values are scalars), and each map has at most ``MAX_PACK_FIELDS`` keys. A
pack that breaks a structural limit is dead-lettered whole (nothing of it is applied); a
well-formed pack with some bad elements has those elements dead-lettered one by one
(``origin`` ends in ``#index``) and the good ones applied.
"""

from __future__ import annotations

import bisect
import itertools
import operator
import re
from collections.abc import Iterable, Iterator, Sequence
from dataclasses import dataclass, field
from typing import Any

import msgpack
import numpy as np

from ..core.intake import digits_to_int64
from ..core.types import Answer, AnswerColumns, KeyRowAnswers, SourceRows
from ..keys import (
    CONTROL_CHARS,
    MAX_ID_BYTES,
    MAX_KEY_BYTES,
    MAX_LABEL_BYTES,
    MAX_PACK_ANSWERS,
    MAX_PACK_BYTES,
    MAX_SOURCE_BYTES,
    has_control,
    question_pack_rows,
)

MAX_PACK_FIELDS = 16  # keys in one packed answer map (six are meaningful)
DEAD_VALUE_BYTES = 4096  # a dead letter repeats at most this much of a packed element's value

# Reasons for the metrics label `reason` (a small fixed set, see serve/metrics.py).
MALFORMED = "malformed"
BAD_KEY = "bad_key"
BAD_VALUE = "bad_value"
UNKNOWN_QID = "unknown_qid"
BAD_PACK = "bad_pack"
TOO_LARGE = "too_large"
ENGINE = "engine"

# C0 controls and DEL in bytes, plus the C1 controls U+0080..U+009F as UTF-8 (0xC2 0x80-9F).
_CTRL_B = re.compile(rb"[\x00-\x1f\x7f]|\xc2[\x80-\x9f]")
_CTRL_S = CONTROL_CHARS

# An entry as redis-py parses it. The worker reads XREADGROUP replies raw instead (see
# ``worker.read_streams``): ``[entry_id, [field, value, ...]]``, or ``[entry_id, None]`` for
# a pending entry whose content was deleted. Every decoder here takes either form.
Entry = tuple[bytes, dict[bytes, bytes]]
Ref = bytes | tuple[bytes, int]

_PLAIN_LAYOUT = [b"a", b"b", b"same", b"source", b"qid"]  # field order of most producers


def as_fields(entries: Sequence[Any]) -> list[Entry]:
    """Entries in the ``(entry_id, {field: value})`` form, whichever form they came in."""
    out: list[Entry] = []
    for eid, f in entries:
        if type(f) is list:
            f = dict(zip(f[0::2], f[1::2]))  # noqa: B905 - Redis always sends pairs
        out.append((eid, f or {}))
    return out


def origin(stream: str, ref: Ref) -> str:
    """The ``origin`` of a dead letter: ``"stream entry-id"`` (``#index`` inside a pack)."""
    if isinstance(ref, tuple):
        return f"{stream} {ref[0].decode()}#{ref[1]}"
    return f"{stream} {ref.decode()}"


@dataclass(slots=True)
class Dead:
    """A rejected entry (or packed element) on its way to ``{NS}:dead``."""

    fields: dict[str, Any]  # the original fields (bytes or str values)
    reason: str  # readable by a person
    kind: str  # one of the metrics reason labels
    origin: str  # "stream entry-id" (packed elements: "stream entry-id#index")

    def to_fields(self) -> dict[bytes | str, bytes | str]:
        out: dict[bytes | str, bytes | str] = {}
        for k, v in self.fields.items():
            name = k.decode("utf-8", "replace") if isinstance(k, bytes) else str(k)
            if name in ("reason", "origin"):  # keep the original, do not let it mask ours
                name = "_" + name
            out[name] = v if isinstance(v, (bytes, str)) else _scalar_text(v)
        out["reason"] = self.reason
        out["origin"] = self.origin
        return out


class Refs(Sequence[Ref]):
    """Where each decoded answer or item came from (a :data:`Ref` each, in order), held
    compactly: a pack decoded whole is one run (entry id, count) instead of a tuple per
    answer; it is expanded only when a dead letter or a filter needs the refs."""

    __slots__ = ("_parts", "_ends")

    def __init__(self, refs: Iterable[Ref] = ()) -> None:
        self._parts: list[list[Ref] | tuple[bytes, int]] = []
        self._ends: list[int] = []  # refs up to the end of each part
        self.extend(refs)

    def append(self, ref: Ref) -> None:
        if self._parts and type(self._parts[-1]) is list:
            self._parts[-1].append(ref)  # type: ignore[union-attr]
            self._ends[-1] += 1
        else:
            self._parts.append([ref])
            self._ends.append(len(self) + 1)

    def extend(self, refs: Iterable[Ref]) -> None:
        refs = list(refs)
        if not refs:
            return
        if self._parts and type(self._parts[-1]) is list:
            self._parts[-1].extend(refs)  # type: ignore[union-attr]
            self._ends[-1] += len(refs)
        else:
            self._parts.append(refs)
            self._ends.append(len(self) + len(refs))

    def __iadd__(self, refs: Iterable[Ref]) -> Refs:
        self.extend(refs)
        return self

    def add_pack(self, eid: bytes, count: int) -> None:
        """Elements 0..count-1 of the pack in entry ``eid``."""
        self._parts.append((eid, count))
        self._ends.append(len(self) + count)

    def __len__(self) -> int:
        return self._ends[-1] if self._ends else 0

    def __iter__(self) -> Iterator[Ref]:
        for part in self._parts:
            if type(part) is list:
                yield from part
            else:
                eid, count = part  # type: ignore[misc]
                yield from zip(itertools.repeat(eid), range(count))

    def __getitem__(self, k: int) -> Ref:  # type: ignore[override]
        if not -len(self) <= k < len(self):
            raise IndexError(k)
        k %= len(self)
        at = bisect.bisect_right(self._ends, k)
        first = self._ends[at - 1] if at else 0
        part = self._parts[at]
        if type(part) is list:
            return part[k - first]
        return (part[0], k - first)  # type: ignore[return-value]

    def __eq__(self, other: object) -> bool:
        if isinstance(other, (Refs, list)):
            return list(self) == list(other)
        return NotImplemented

    def __repr__(self) -> str:
        return f"Refs({list(self)!r})"


@dataclass(slots=True)
class Decoded:
    """What one batch of entries of a stream turned into."""

    items: list[tuple[str, str | None]] = field(default_factory=list)
    cols: AnswerColumns = field(default_factory=AnswerColumns.empty)  # the good answers
    # or, when the batch is column packs of keys of one length that answer qids, the same
    # as rows of bytes (``cols`` then stays empty): see _key_row_packs
    keyed: KeyRowAnswers | None = None
    aids: list[str | None] = field(default_factory=list)  # parallel to cols
    # parallel to answers / items: the entry id, or (entry id, index) inside a pack; turned
    # into the readable "stream id[#index]" only when a dead letter needs it
    origins: Refs = field(default_factory=Refs)
    dead: list[Dead] = field(default_factory=list)
    missing: int = 0  # pending entries whose content was deleted before we read it

    @property
    def answers(self) -> list[Answer]:
        """The good answers as rows (tests and slow paths; the worker uses ``cols`` or
        ``keyed``)."""
        return self.keyed.rows() if self.keyed is not None else self.cols.rows()


def _scalar_text(v: Any) -> str:
    text = v.decode("utf-8", "replace") if isinstance(v, bytes) else repr(v)
    return text[:DEAD_VALUE_BYTES]


class _Bad(Exception):
    def __init__(self, kind: str, reason: str) -> None:
        super().__init__(reason)
        self.kind = kind
        self.reason = reason


def _text(raw: bytes, name: str, limit: int) -> str:
    """Validate one bytes field as a contract string (1..limit bytes, UTF-8, no controls)."""
    n = len(raw)
    if n == 0 or n > limit:
        raise _Bad(BAD_KEY if name in ("a", "b", "key") else BAD_VALUE,
                   f"{name} must be 1 to {limit} bytes (got {n})")
    if _CTRL_B.search(raw) is not None:
        raise _Bad(BAD_KEY if name in ("a", "b", "key") else BAD_VALUE,
                   f"{name} contains a control character")
    try:
        return raw.decode()
    except UnicodeDecodeError:
        raise _Bad(BAD_KEY if name in ("a", "b", "key") else BAD_VALUE,
                   f"{name} is not valid UTF-8") from None


def _stext(v: Any, name: str, limit: int) -> str:
    """Validate one packed value (a str; bytes are accepted if they are UTF-8)."""
    if isinstance(v, bytes):
        return _text(v, name, limit)
    if not isinstance(v, str):
        raise _Bad(BAD_VALUE, f"{name} must be a string (got {type(v).__name__})")
    n = len(v)
    if n == 0 or (n * 4 > limit and len(v.encode()) > limit):
        kind = BAD_KEY if name in ("a", "b") else BAD_VALUE
        raise _Bad(kind, f"{name} must be 1 to {limit} bytes")
    if _CTRL_S.search(v) is not None:
        raise _Bad(BAD_KEY if name in ("a", "b") else BAD_VALUE,
                   f"{name} contains a control character")
    return v


def decode_items(stream: str, entries: Sequence[Entry]) -> Decoded:
    """Turn ``{NS}:items`` entries into ``(key, side)`` pairs and dead letters."""
    out = Decoded()
    items, origins, dead = out.items, out.origins, out.dead
    for eid, fields in as_fields(entries):
        if not fields:
            out.missing += 1
            continue
        try:
            raw = fields.get(b"key")
            if raw is None:
                raise _Bad(MALFORMED, "missing field key")
            key = _text(raw, "key", MAX_KEY_BYTES)
            rside = fields.get(b"side")
            side = None if rside is None else _text(rside, "side", MAX_LABEL_BYTES)
        except _Bad as bad:
            dead.append(Dead(fields, bad.reason, bad.kind, f"{stream} {eid.decode()}"))
            continue
        items.append((key, side))
        origins.append(eid)
    return out


def _fast_answers(entries: Sequence[Entry], out: Decoded) -> bool:
    """The common case, checked for the whole batch at once: every entry a good plain answer.

    All text fields (five per entry; an absent optional one as an empty string) are joined
    by NUL and decoded once; one regex search then finds any control character, and the
    split must give back exactly the fields joined (a NUL inside a value would add one).
    Returns False, having added nothing, if anything needs the entry-by-entry path.
    """
    texts: list[bytes] = []
    rows = []
    empty = b""
    layout = _PLAIN_LAYOUT
    qid_missing = aid_given = False  # (only entries read by name can set these)
    for eid, f in entries:
        if type(f) is list:  # a raw reply: the usual field order is read by position
            if len(f) == 10 and f[0::2] == layout:
                ra, rb, rs, src, qid = f[1], f[3], f[5], f[7], f[9]
                aid = None
                if ra == rb or (rs != b"1" and rs != b"0"):
                    return False
                if not (0 < len(ra) <= MAX_KEY_BYTES and 0 < len(rb) <= MAX_KEY_BYTES
                        and 0 < len(src) <= MAX_SOURCE_BYTES and 0 < len(qid) <= MAX_ID_BYTES):
                    return False
                texts += (ra, rb, src, qid, empty)
                rows.append((eid, rs == b"1", True, False))
                continue
            if not f or len(f) % 2:
                return False
            f = dict(zip(f[0::2], f[1::2], strict=True))
        elif not f:
            return False
        ra, rb, rs = f.get(b"a"), f.get(b"b"), f.get(b"same")
        if ra is None or rb is None or ra == rb or (rs != b"1" and rs != b"0"):
            return False
        src, qid, aid = f.get(b"source"), f.get(b"qid"), f.get(b"aid")
        if not (0 < len(ra) <= MAX_KEY_BYTES and 0 < len(rb) <= MAX_KEY_BYTES):
            return False
        if src is None:
            src = empty
        elif not 0 < len(src) <= MAX_SOURCE_BYTES:
            return False
        if qid is not None and not 0 < len(qid) <= MAX_ID_BYTES:
            return False
        if aid is not None and not 0 < len(aid) <= MAX_ID_BYTES:
            return False
        texts += (ra, rb, src, qid or empty, aid or empty)
        rows.append((eid, rs == b"1", qid is not None, aid is not None))
        qid_missing = qid_missing or qid is None
        aid_given = aid_given or aid is not None
    raw = b"\0".join(texts)
    try:
        text = raw.decode()
    except UnicodeDecodeError:
        return False
    if has_control(raw if raw.isascii() else text, nul_ok=True):
        return False
    parts = text.split("\0")
    if len(parts) != len(texts):
        return False
    cols = out.cols
    cols.a += parts[0::5]
    cols.b += parts[1::5]
    cols.same += map(_ROW_SAME, rows)
    cols.source += parts[2::5]
    if qid_missing:
        cols.qid += [q if r[2] else None for q, r in zip(parts[3::5], rows, strict=True)]
    else:
        cols.qid += parts[3::5]
    if aid_given:
        out.aids += [x if r[3] else None for x, r in zip(parts[4::5], rows, strict=True)]
    else:
        out.aids += [None] * len(rows)
    out.origins += map(_ROW_EID, rows)
    return True


_ROW_EID, _ROW_SAME = operator.itemgetter(0), operator.itemgetter(1)  # of _fast_answers' rows


def decode_answers(stream: str, entries: Sequence[Entry]) -> Decoded:
    """Turn ``{NS}:answers`` entries (plain or packed) into answers and dead letters."""
    out = Decoded()
    if _key_row_packs(entries, out) or _fast_answers(entries, out):
        return out
    answers, aids, origins, dead = out.cols, out.aids, out.origins, out.dead
    for eid, fields in as_fields(entries):
        if not fields:
            out.missing += 1
            continue
        pack = fields.get(b"pack")
        if pack is not None:
            _decode_pack(stream, eid, fields, pack, out)
            continue
        try:
            ra, rb, rs = fields.get(b"a"), fields.get(b"b"), fields.get(b"same")
            if ra is None or rb is None or rs is None:
                missing = [n for n, v in (("a", ra), ("b", rb), ("same", rs)) if v is None]
                raise _Bad(MALFORMED, "missing field " + ", ".join(missing))
            if ra == rb:
                raise _Bad(BAD_VALUE, "a and b are the same item")
            a = _text(ra, "a", MAX_KEY_BYTES)
            b = _text(rb, "b", MAX_KEY_BYTES)
            if rs == b"1":
                same = True
            elif rs == b"0":
                same = False
            else:
                raise _Bad(BAD_VALUE, "same must be 1 or 0")
            v = fields.get(b"source")
            source = "" if v is None else _text(v, "source", MAX_SOURCE_BYTES)
            v = fields.get(b"qid")
            qid = None if v is None else _text(v, "qid", MAX_ID_BYTES)
            v = fields.get(b"aid")
            aid = None if v is None else _text(v, "aid", MAX_ID_BYTES)
        except _Bad as bad:
            dead.append(Dead(fields, bad.reason, bad.kind, f"{stream} {eid.decode()}"))
            continue
        answers.append(Answer(a, b, same, source, qid))
        aids.append(aid)
        origins.append(eid)
    return out


def _key_row_packs(entries: Sequence[Entry], out: Decoded) -> bool:
    """The packed producer's usual batch, without a Python object per answer: every entry a
    column pack (nothing but its ``pack`` field) whose keys all have one length in bytes
    and whose every answer names a qid (see _key_row_pack). Returns False, having added
    nothing, when anything needs the general path (which then decides, as always)."""
    if not entries:
        return False
    parts: list[tuple[bytes, KeyRowAnswers, list[Any] | None]] = []
    for eid, f in entries:
        if type(f) is list:
            if len(f) != 2 or f[0] != b"pack":
                return False
            pack = f[1]
        elif type(f) is dict and len(f) == 1 and b"pack" in f:
            pack = f[b"pack"]
        else:
            return False
        got = _key_row_pack(pack)
        if got is None:
            return False
        parts.append((eid, *got))
    if len({p[1].a_rows.shape[1] for p in parts}) != 1:  # keys of different lengths
        return False
    if len(parts) == 1:
        keyed = parts[0][1]
    else:
        keyed = KeyRowAnswers(*(np.concatenate([getattr(p[1], c) for p in parts])
                                for c in ("a_rows", "b_rows", "same")),
                              SourceRows.concatenate([p[1].source for p in parts]),
                              np.concatenate([p[1].qn for p in parts]))
    out.keyed = keyed
    for eid, k, aids in parts:
        out.aids += [None] * len(k) if aids is None else aids
        out.origins.add_pack(eid, len(k))
    return True


def _sources(pack: bytes, span: tuple[int, int] | None, n: int) -> Sequence[str] | None:
    """The ``source`` column of a pack of ``n`` answers: byte rows when every name has one
    length (1 to ``_FAST_CHARS`` bytes) and is text as the general path accepts it, else
    a list of str as ``_short_texts`` accepts them, else None. No column: anonymous."""
    if span is None:
        return [""] * n  # anonymous, as in the general path
    got = _str_rows(pack, *span)
    if got is not None and len(got[0]) == n and got[0].shape[1] - got[1] <= _FAST_CHARS:
        rows, hw = got
        return SourceRows(np.ascontiguousarray(rows[:, hw:]))
    try:
        source = msgpack.unpackb(pack[span[0]:span[1]], raw=False, **_PACK_LIMITS)
    except Exception:  # noqa: BLE001 - the general path names the problem
        return None
    if type(source) is not list or len(source) != n or not _short_texts(source):
        return None
    return source


_PACK_LIMITS = {"max_array_len": MAX_PACK_ANSWERS, "max_map_len": MAX_PACK_FIELDS,
                "max_str_len": MAX_PACK_BYTES, "max_bin_len": MAX_PACK_BYTES,
                "max_ext_len": 0}


def _key_row_pack(pack: Any) -> tuple[KeyRowAnswers, list[Any] | None] | None:
    """A column pack read straight into a :class:`KeyRowAnswers` (and its aids, None when
    it has none), or None when it is anything else or anything in it needs a closer look:
    keys ``a`` and ``b`` as strings of one byte length (1 to 255 bytes) with ``a != b``,
    ``same`` as booleans or 0/1, every ``qid`` a number written in 1 to 18 digits without
    leading zeros, ``source`` (if present) strings, ``aid`` (if present) short texts or nil.
    The key, qid and flag arrays are located by the msgpack reader and read by numpy."""
    if type(pack) is not bytes or len(pack) > MAX_PACK_BYTES:
        return None
    try:
        u = msgpack.Unpacker(raw=False, max_buffer_size=len(pack) or 1, **_PACK_LIMITS)
        u.feed(pack)
        spans: dict[str, tuple[int, int]] = {}
        other: dict[str, Any] = {}
        for _ in range(u.read_map_header()):
            name = u.unpack()
            if name in spans or name in other:
                return None
            start = u.tell()
            if name in ("a", "b", "same", "qid", "source"):
                u.skip()
                spans[name] = (start, u.tell())
            elif name == "aid":
                other[name] = u.unpack()
            else:
                u.skip()  # other keys are ignored, as in the general path
        if u.tell() != len(pack) or len(spans) != 4 + ("source" in spans):
            return None
    except Exception:  # noqa: BLE001 - anything odd: the general path names the problem
        return None
    ga, gb = _str_rows(pack, *spans["a"]), _str_rows(pack, *spans["b"])
    same, qn = _flags(pack, *spans["same"]), _numbers(pack, *spans["qid"])
    if ga is None or gb is None or same is None or qn is None:
        return None
    (ma, hw), mb = ga, gb[0]
    n, width = ma.shape
    if mb.shape != ma.shape or not (len(same) == len(qn) == n):
        return None
    if np.count_nonzero(ma.view(f"V{width}") == mb.view(f"V{width}")):  # a is b somewhere
        return None
    a, b = ma[:, hw:], mb[:, hw:]
    source = _sources(pack, spans.get("source"), n)
    if source is None:
        return None
    aids = other.get("aid")
    if aids is not None:
        if type(aids) is not list or len(aids) != n:
            return None
        given = [v for v in aids if v is not None]
        if given and not _short_texts(given):
            return None
    return KeyRowAnswers(a, b, same, source, qn), aids


def _array_body(buf: bytes, start: int) -> tuple[int, int] | None:
    """(element count, offset of the first element) of the msgpack array at ``start``, or
    None when none starts there (or its header is cut short)."""
    h = buf[start]
    if 0x90 <= h <= 0x9F:
        return h & 0x0F, start + 1
    if h == 0xDC and len(buf) >= start + 3:
        return int.from_bytes(buf[start + 1:start + 3], "big"), start + 3
    if h == 0xDD and len(buf) >= start + 5:
        return int.from_bytes(buf[start + 1:start + 5], "big"), start + 5
    return None


def pack_answer_count(pack: bytes) -> int:
    """Answers in a ``pack`` field, from its headers only: the length of a pack of maps (an
    array), or of a column pack's ``a``, ``b`` or ``same`` array, whichever comes first (the
    codec requires them of one length); 1 for anything else (the codec will reject it)."""
    body = _array_body(pack, 0)
    if body is not None:
        return body[0]
    if not (0x80 <= pack[0] <= 0x8F or pack[0] in (0xDE, 0xDF)):
        return 1
    unpacker = msgpack.Unpacker(raw=False, strict_map_key=False, max_buffer_size=len(pack),
                                **_PACK_LIMITS)
    try:
        unpacker.feed(pack)
        for _ in range(unpacker.read_map_header()):
            if unpacker.unpack() in ("a", "b", "same"):
                return max(1, unpacker.read_array_header())
            unpacker.skip()
    except Exception:  # noqa: BLE001 - msgpack raises several unrelated types
        pass
    return 1


def _same_width(buf: bytes, start: int, end: int) -> tuple[np.ndarray, int] | None:
    """The elements of the array at ``start``, whole (string header, then the bytes), as
    the rows of a uint8 matrix, with the length of their header (1: fixstr, 2: str8), when
    every element is a string of one byte length (1 to 255) written with one header."""
    body = _array_body(buf, start)
    if body is None or body[0] == 0:
        return None
    n, at = body
    head = buf[at]
    if 0xA1 <= head <= 0xBF:
        hw, size = 1, head & 0x1F
    elif head == 0xD9 and at + 1 < end and buf[at + 1] > 0:
        hw, size = 2, buf[at + 1]
    else:
        return None
    width = hw + size
    if end - at != n * width:
        return None
    m = np.frombuffer(buf, dtype=np.uint8, count=n * width, offset=at).reshape(n, width)
    if np.count_nonzero(m[:, 0] != head) or (hw == 2 and np.count_nonzero(m[:, 1] != size)):
        return None
    return m, hw


def _str_rows(buf: bytes, start: int, end: int) -> tuple[np.ndarray, int] | None:
    """``_same_width`` of strings that are text as the general path accepts it: no control
    character (a byte below 0x20, or DEL; C1 controls too) and valid UTF-8 in each (checked
    only when some byte is not ASCII). The checks run over the whole elements at once: a
    header byte is never below 0x20 nor DEL, except the length byte of a str8 (then a key
    of 127 bytes takes the general path)."""
    got = _same_width(buf, start, end)
    if got is None:
        return None
    m, hw = got
    flat = m.reshape(-1)
    if np.count_nonzero((flat < 0x20) | (flat == 0x7F)):
        return None
    if np.count_nonzero(flat >= 0x80) != np.count_nonzero(m[:, :hw] >= 0x80):
        try:  # some key is not ASCII
            texts = KeyRowAnswers.texts(m[:, hw:])
        except UnicodeDecodeError:
            return None
        if has_control("\0".join(texts), nul_ok=True):
            return None
    return got


def _flags(buf: bytes, start: int, end: int) -> np.ndarray | None:
    """An array of true/false (or 0/1) as booleans."""
    body = _array_body(buf, start)
    if body is None or end - body[1] != body[0]:
        return None
    v = np.frombuffer(buf, dtype=np.uint8, count=body[0], offset=body[1])
    yes, no = (v == 0xC3) | (v == 1), (v == 0xC2) | (v == 0)
    if np.count_nonzero(yes) + np.count_nonzero(no) != len(v):
        return None
    return yes


def _numbers(buf: bytes, start: int, end: int) -> np.ndarray | None:
    """An array of qids written as 1 to 18 digits without a leading zero, as numbers: by
    numpy when they all have one length, else (qids across a power of ten) through the
    msgpack reader."""
    got = _same_width(buf, start, end)
    if got is not None:
        m, hw = got
        digits = m[:, hw:]
        n, width = digits.shape
        # every byte but the headers a digit (a header byte is 0xA1 or more)
        if width > 18 or np.count_nonzero(m.reshape(-1) - np.uint8(48) <= 9) != n * width:
            return None
        if width > 1 and np.count_nonzero(digits[:, 0] == 48):
            return None
        return (digits - 48).astype(np.int64) @ (10 ** np.arange(width - 1, -1, -1,
                                                                 dtype=np.int64))
    try:
        texts = msgpack.unpackb(buf[start:end], raw=False, **_PACK_LIMITS)
    except Exception:  # noqa: BLE001
        return None
    if type(texts) is not list or not texts or set(map(type, texts)) != {str}:
        return None
    if any(len(t) > 1 and t[0] == "0" for t in texts):
        return None
    return digits_to_int64(texts)


def _unpack_pack(pack: bytes) -> list[Any] | ColumnPack:
    if len(pack) > MAX_PACK_BYTES:
        raise _Bad(TOO_LARGE, f"pack is {len(pack)} bytes; the limit is {MAX_PACK_BYTES}")
    try:
        data = msgpack.unpackb(
            pack, raw=False, strict_map_key=False, max_array_len=MAX_PACK_ANSWERS,
            max_map_len=MAX_PACK_FIELDS, max_str_len=MAX_PACK_BYTES,
            max_bin_len=MAX_PACK_BYTES, max_ext_len=0,
        )
    except ValueError as exc:  # includes the length limits above and bad UTF-8
        # some msgpack errors carry no message: name the problem instead of "()"
        text = str(exc) or _UNPACK_WHY.get(type(exc).__name__, type(exc).__name__)
        if "exceeds max_array_len" in text:
            raise _Bad(TOO_LARGE, f"pack holds more than {MAX_PACK_ANSWERS} answers") from None
        raise _Bad(BAD_PACK, f"pack is not valid msgpack within the limits ({text})") from None
    except Exception as exc:  # noqa: BLE001 - msgpack raises several unrelated types
        raise _Bad(BAD_PACK, f"pack is not valid msgpack ({type(exc).__name__})") from None
    if isinstance(data, dict):
        return _column_pack(data)
    if not isinstance(data, list):
        raise _Bad(BAD_PACK, "pack must be a msgpack array of answers or a map of answer "
                             f"columns (got {type(data).__name__})")
    if not data:
        raise _Bad(BAD_PACK, "pack is an empty array")
    return data


COLUMN_FIELDS = ("a", "b", "same", "source", "qid", "aid")


class ColumnPack:
    """A column pack, checked for shape: ``cols[name]`` is a list of ``n`` values (``None``
    for an absent optional field)."""

    __slots__ = ("cols", "n")

    def __init__(self, cols: dict[str, list[Any]], n: int) -> None:
        self.cols, self.n = cols, n

    def rows(self) -> list[dict[str, Any]]:
        """The same answers as the maps of a row pack (absent fields left out)."""
        names = [k for k in COLUMN_FIELDS if k in self.cols]
        out = []
        for i in range(self.n):
            out.append({k: self.cols[k][i] for k in names if self.cols[k][i] is not None})
        return out


def _column_pack(data: dict[Any, Any]) -> ColumnPack:
    """Check a column pack's shape: arrays ``a``, ``b`` and ``same`` of one length n >= 1,
    and ``source``, ``qid``, ``aid`` of that length if present (other keys are ignored)."""
    cols = {k: data[k] for k in COLUMN_FIELDS if k in data}
    missing = [k for k in ("a", "b", "same") if k not in cols]
    if missing:
        raise _Bad(BAD_PACK, "a column pack needs the arrays a, b and same (missing "
                             + ", ".join(missing) + ")")
    if any(type(v) is not list for v in cols.values()):
        bad = [k for k, v in cols.items() if type(v) is not list]
        raise _Bad(BAD_PACK, "every field of a column pack must be an array (not: "
                             + ", ".join(bad) + ")")
    n = len(cols["a"])
    if n == 0:
        raise _Bad(BAD_PACK, "pack is an empty column pack")
    if any(len(v) != n for v in cols.values()):
        raise _Bad(BAD_PACK, "the arrays of a column pack must all have the same length "
                             "(" + ", ".join(f"{k}: {len(v)}" for k, v in cols.items()) + ")")
    return ColumnPack(cols, n)


_UNPACK_WHY = {"FormatError": "a byte that starts no msgpack value",
               "StackError": "nested too deeply"}
_FAST_CHARS = 32  # strings this short are within every byte limit even at 4 bytes a char


def _fast_pack(data: list[Any], eid: bytes, out: Decoded) -> bool:
    """A whole pack of plain, short, well-typed answers, checked at once (see _fast_answers).

    The fields are pulled out as columns and every check runs over a whole column. Returns
    False, having added nothing, when any element needs the per-element path.
    """
    if set(map(type, data)) != {dict}:
        return False
    get = dict.get
    return _fast_columns([get(el, "a") for el in data], [get(el, "b") for el in data],
                         [get(el, "same") for el in data],
                         [[get(el, name) for el in data] for name in ("source", "qid", "aid")],
                         eid, out)


def _fast_columns(a: list[Any], b: list[Any], s: list[Any], optional: list[list[Any]],
                  eid: bytes, out: Decoded) -> bool:
    """Check and add answer columns at once (source, qid and aid in ``optional``; None
    where absent). Returns False, having added nothing, if any value needs a closer look."""
    texts = a + b
    for col in optional:
        texts += [v for v in col if v is not None] if None in col else col
    if not _short_texts(texts) or any(map(operator.eq, a, b)):
        return False
    same_types = set(map(type, s))
    if not same_types <= {bool, int} or not set(s) <= {0, 1}:
        return False
    src, qid, aid = optional
    dst = out.cols
    dst.a += a
    dst.b += b
    dst.same += s if same_types == {bool} else map(bool, s)  # (0 and 1 only, checked above)
    dst.source += ["" if v is None else v for v in src] if None in src else src
    dst.qid += qid
    out.aids += aid
    out.origins.add_pack(eid, len(a))
    return True


def _short_texts(texts: list[Any]) -> bool:
    """Whether every value is a str of 1 to ``_FAST_CHARS`` characters without a control
    character. They are joined by NUL (which proves they are all str); ASCII text (the
    usual case) is then measured by numpy from the positions of the NULs, which must be
    exactly the separators."""
    try:
        joined = "\0".join(texts)
    except TypeError:  # some value is not a str (bytes, a number, nil in a or b)
        return False
    if has_control(joined, nul_ok=True):
        return False
    if not joined.isascii():
        return ("" not in texts and max(map(len, texts)) <= _FAST_CHARS
                and joined.count("\0") == len(texts) - 1)
    ends = np.flatnonzero(np.frombuffer(joined.encode("ascii"), dtype=np.uint8) == 0)
    if len(ends) != len(texts) - 1:  # a NUL inside a value
        return False
    sizes = np.diff(ends, prepend=-1, append=len(joined)) - 1
    return bool(sizes.min() > 0) and bool(sizes.max() <= _FAST_CHARS)


def _decode_pack(stream: str, eid: bytes, fields: dict[bytes, bytes], pack: bytes,
                 out: Decoded) -> None:
    where = f"{stream} {eid.decode()}"
    try:
        if len(fields) != 1:
            raise _Bad(MALFORMED, "a pack entry carries only the field pack")
        data = _unpack_pack(pack)
    except _Bad as bad:
        out.dead.append(Dead(fields, bad.reason, bad.kind, where))
        return
    if isinstance(data, ColumnPack):
        c, none = data.cols, [None] * data.n
        if _fast_columns(c["a"], c["b"], c["same"], [c.get(k, none) for k in
                                                     ("source", "qid", "aid")], eid, out):
            return
        data = data.rows()  # a closer look, element by element
    elif _fast_pack(data, eid, out):
        return
    answers, aids, origins = out.cols, out.aids, out.origins
    for i, el in enumerate(data):
        try:
            if not isinstance(el, dict):
                raise _Bad(MALFORMED, f"pack element must be a map (got {type(el).__name__})")
            va, vb, vs = el.get("a"), el.get("b"), el.get("same")
            if va is None or vb is None or vs is None:
                missing = [n for n, v in (("a", va), ("b", vb), ("same", vs)) if v is None]
                raise _Bad(MALFORMED, "missing field " + ", ".join(missing))
            a = _stext(va, "a", MAX_KEY_BYTES)
            b = _stext(vb, "b", MAX_KEY_BYTES)
            if a == b:
                raise _Bad(BAD_VALUE, "a and b are the same item")
            if vs is True or vs is False:
                same = vs
            elif type(vs) is int and (vs == 0 or vs == 1):
                same = vs == 1
            elif vs in ("1", "0", b"1", b"0"):
                same = vs in ("1", b"1")
            else:
                raise _Bad(BAD_VALUE, "same must be 1, 0, true or false")
            v = el.get("source")
            source = "" if v is None else _stext(v, "source", MAX_SOURCE_BYTES)
            v = el.get("qid")
            qid = None if v is None else _stext(v, "qid", MAX_ID_BYTES)
            v = el.get("aid")
            aid = None if v is None else _stext(v, "aid", MAX_ID_BYTES)
        except _Bad as bad:
            shown = el if isinstance(el, dict) else {"element": el}
            out.dead.append(Dead(dict(shown), bad.reason, bad.kind, f"{where}#{i}"))
            continue
        answers.append(Answer(a, b, same, source, qid))
        aids.append(aid)
        origins.append((eid, i))


# -- encoding of the worker's own outputs ---------------------------------------------------


def pack_answers(answers: Sequence[Answer], aids: Sequence[str | None] | None = None) -> bytes:
    """The ``pack`` field value for a batch of answers (used by clients, tests, benches)."""
    rows = []
    for i, ans in enumerate(answers):
        m: dict[str, Any] = {"a": ans.a, "b": ans.b, "same": 1 if ans.same else 0}
        if ans.source:
            m["source"] = ans.source
        if ans.qid is not None:
            m["qid"] = ans.qid
        if aids is not None and aids[i] is not None:
            m["aid"] = aids[i]
        rows.append(m)
    return msgpack.packb(rows, use_bin_type=True)


def pack_answer_columns(answers: Sequence[Answer], aids: Sequence[str | None] | None = None
                        ) -> bytes:
    """The ``pack`` field value as a column pack: one array per field (cheaper to write
    and to read than a pack of maps; at most ``MAX_PACK_ANSWERS`` answers)."""
    cols: dict[str, list[Any]] = {"a": [x.a for x in answers], "b": [x.b for x in answers],
                                  "same": [1 if x.same else 0 for x in answers]}
    if any(x.source for x in answers):
        cols["source"] = [x.source or None for x in answers]
    if any(x.qid is not None for x in answers):
        cols["qid"] = [x.qid for x in answers]
    if aids is not None and any(x is not None for x in aids):
        cols["aid"] = list(aids)
    return msgpack.packb(cols, use_bin_type=True)


def answer_fields(ans: Answer, aid: str | None = None) -> dict[str, str]:
    """The fields of a one-answer ``{NS}:answers`` entry."""
    f = {"a": ans.a, "b": ans.b, "same": "1" if ans.same else "0"}
    if ans.source:
        f["source"] = ans.source
    if ans.qid is not None:
        f["qid"] = ans.qid
    if aid is not None:
        f["aid"] = aid
    return f


def decode_questions(entries: Iterable[Entry]) -> list[dict[str, Any]]:
    """Read ``{NS}:questions`` entries (plain or packed) into dicts (for adapters, tests)."""
    out: list[dict[str, Any]] = []
    for _eid, fields in entries:
        pack = fields.get(b"pack")
        if pack is not None:
            out.extend(question_pack_rows(pack))
        else:
            out.append({k.decode(): v.decode() for k, v in fields.items()})
    return out
