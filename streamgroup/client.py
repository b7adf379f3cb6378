"""The Python client of the wire contract: push items and answers, look up, read questions.

Everything here is plain Redis commands on the keys of :mod:`streamgroup.keys`, so any other
language can do the same; this module only adds client-side validation (a bad value fails
here, with a clear message, before anything is sent) and the packing of many answers into
one entry. Inputs given as a batch are validated in full before the first write, so a bad
element means nothing of that batch is pushed.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Iterator, Mapping, Sequence
from typing import Any

import msgpack
import redis

from .errors import StreamgroupError
from .keys import (
    CONTROL_CHARS,
    DEFAULT_NS,
    MAX_ID_BYTES,
    MAX_KEY_BYTES,
    MAX_LABEL_BYTES,
    MAX_PACK_ANSWERS,
    MAX_PACK_BYTES,
    MAX_SOURCE_BYTES,
    QUESTION_FIELDS,
    STATUSES,
    Keys,
    question_pack_rows,
    valid_namespace,
)

_PIPELINE_CHUNK = 1000  # entries per round trip when pushing many
_TRUE = ("1", "true", "yes", "same")
_FALSE = ("0", "false", "no", "different")


class ClientInputError(StreamgroupError, ValueError):
    """A value handed to the client breaks the contract; nothing was sent."""


def check_text(value: object, what: str, max_bytes: int) -> str:
    """Return ``value`` if it is 1..max_bytes of UTF-8 without control characters."""
    if not isinstance(value, str):
        raise ClientInputError(f"{what} must be a string, got {type(value).__name__}")
    try:
        size = len(value.encode("utf-8"))
    except UnicodeEncodeError:
        raise ClientInputError(f"{what} {value[:40]!r} is not valid UTF-8") from None
    if size == 0:
        raise ClientInputError(f"{what} is empty")
    if size > max_bytes:
        raise ClientInputError(f"{what} {value[:40]!r}... is {size} bytes (limit {max_bytes})")
    if CONTROL_CHARS.search(value):
        raise ClientInputError(f"{what} {value[:40]!r} contains a control character")
    return value


def check_same(value: object) -> bool:
    """Accept True/False, 1/0 and the strings 1/0/true/false/yes/no/same/different."""
    if isinstance(value, bool):
        return value
    if isinstance(value, int) and value in (0, 1):
        return bool(value)
    if isinstance(value, str):
        s = value.strip().lower()
        if s in _TRUE:
            return True
        if s in _FALSE:
            return False
    raise ClientInputError(f"same must be 1 or 0 (or true/false), got {value!r}")


def item_fields(key: object, side: object = None) -> dict[str, str]:
    """The entry of ``{NS}:items`` for one item, validated."""
    out = {"key": check_text(key, "item key", MAX_KEY_BYTES)}
    if side is not None and side != "":
        out["side"] = check_text(side if not isinstance(side, int) else str(side),
                                 "side label", MAX_LABEL_BYTES)
    return out


def answer_fields(a: object, b: object, same: object, source: object = None,
                  qid: object = None, aid: object = None) -> dict[str, str]:
    """The entry of ``{NS}:answers`` for one answer, validated (``same`` as ``1``/``0``)."""
    out = {
        "a": check_text(a, "item key a", MAX_KEY_BYTES),
        "b": check_text(b, "item key b", MAX_KEY_BYTES),
        "same": "1" if check_same(same) else "0",
    }
    if out["a"] == out["b"]:
        raise ClientInputError(f"an answer needs two different items, got a = b = {a!r}")
    for name, value, limit in (("source", source, MAX_SOURCE_BYTES), ("qid", qid, MAX_ID_BYTES),
                               ("aid", aid, MAX_ID_BYTES)):
        if value is not None and value != "":
            out[name] = check_text(value, name, limit)
    return out


def as_answer_fields(obj: Any) -> dict[str, str]:
    """Accept a mapping, an object with attributes (e.g. core Answer) or a tuple."""
    if isinstance(obj, Mapping):
        unknown = set(obj) - {"a", "b", "same", "source", "qid", "aid"}
        if unknown:
            raise ClientInputError(f"unknown answer field(s): {', '.join(sorted(unknown))}")
        for need in ("a", "b", "same"):
            if need not in obj:
                raise ClientInputError(f"an answer needs field {need!r}")
        return answer_fields(obj["a"], obj["b"], obj["same"], obj.get("source"),
                             obj.get("qid"), obj.get("aid"))
    if hasattr(obj, "a") and hasattr(obj, "b") and hasattr(obj, "same"):
        return answer_fields(obj.a, obj.b, obj.same, getattr(obj, "source", None) or None,
                             getattr(obj, "qid", None), getattr(obj, "aid", None))
    if isinstance(obj, Sequence) and not isinstance(obj, str) and 3 <= len(obj) <= 6:
        return answer_fields(*obj)
    raise ClientInputError(f"cannot read an answer from {obj!r}")


def as_item_fields(obj: Any) -> dict[str, str]:
    if isinstance(obj, str):
        return item_fields(obj)
    if isinstance(obj, Mapping):
        unknown = set(obj) - {"key", "side"}
        if unknown:
            raise ClientInputError(f"unknown item field(s): {', '.join(sorted(unknown))}")
        if "key" not in obj:
            raise ClientInputError("an item needs field 'key'")
        return item_fields(obj["key"], obj.get("side"))
    if isinstance(obj, Sequence) and 1 <= len(obj) <= 2:
        return item_fields(*obj)
    raise ClientInputError(f"cannot read an item from {obj!r}")


def _packed_map(fields: Mapping[str, str]) -> dict[str, Any]:
    m: dict[str, Any] = dict(fields)
    m["same"] = fields["same"] == "1"
    return m


def pack_answers(answers: Sequence[Mapping[str, str]]) -> list[bytes]:
    """Split validated answers into msgpack payloads within the pack limits of the contract."""
    packs: list[bytes] = []
    chunk: list[dict[str, Any]] = []
    size = 5  # msgpack array32 header
    for fields in answers:
        m = _packed_map(fields)
        n = len(msgpack.packb(m))
        if chunk and (len(chunk) >= MAX_PACK_ANSWERS or size + n > MAX_PACK_BYTES):
            packs.append(msgpack.packb(chunk))
            chunk, size = [], 5
        chunk.append(m)
        size += n
    if chunk:
        packs.append(msgpack.packb(chunk))
    return packs


def pack_answer_columns(answers: Sequence[Mapping[str, str]]) -> list[bytes]:
    """Validated answers as column packs (a map of field arrays) within the pack limits."""
    if not answers:
        return []
    if len(answers) > MAX_PACK_ANSWERS:
        return [p for i in range(0, len(answers), MAX_PACK_ANSWERS)
                for p in pack_answer_columns(answers[i:i + MAX_PACK_ANSWERS])]
    cols: dict[str, list[Any]] = {"a": [f["a"] for f in answers],
                                  "b": [f["b"] for f in answers],
                                  "same": [f["same"] == "1" for f in answers]}
    for name in ("source", "qid", "aid"):
        if any(name in f for f in answers):
            cols[name] = [f.get(name) for f in answers]
    payload = msgpack.packb(cols, use_bin_type=True)
    if len(payload) > MAX_PACK_BYTES and len(answers) > 1:
        half = len(answers) // 2
        return pack_answer_columns(answers[:half]) + pack_answer_columns(answers[half:])
    return [payload]


def _text(v: Any) -> Any:
    return v.decode("utf-8", "replace") if isinstance(v, bytes) else v


def decode_record(key: str, raw: bytes) -> dict[str, Any]:
    """A ``{NS}:assign`` value (msgpack map) as a plain dict, with the item ``key`` added."""
    data = msgpack.unpackb(raw, raw=False)
    if not isinstance(data, dict):
        raise StreamgroupError(f"assignment of {key!r} is not a msgpack map")
    out: dict[str, Any] = {"key": key}
    for name in ("side", "status", "llr", "answers", "rev", "pinned"):
        out[name] = _text(data.get(name))
    if isinstance(out["llr"], float) and not math.isfinite(out["llr"]):
        out["llr"] = None
    return out


def decode_questions(fields: Mapping[bytes, bytes]) -> list[dict[str, Any]]:
    """One ``{NS}:questions`` entry as a list of question dicts (a packed entry holds many)."""
    if b"pack" in fields:
        items = question_pack_rows(fields[b"pack"])
        return [{k: _text(q.get(k)) for k in QUESTION_FIELDS} for q in items]
    q = {k: _text(fields.get(k.encode())) for k in QUESTION_FIELDS}
    return [q]


class Client:
    """Talk to one streamgroup deployment: ``Client("redis://host:6379/0", ns="sg")``.

    The connection opens lazily on the first command. Crowd adapters: a question carries
    ``why`` (seed, place or check) for your logs; never show it to the person answering,
    or check questions stop looking like any other question.
    """

    def __init__(self, url: str, ns: str = DEFAULT_NS, *, connection: redis.Redis | None = None,
                 timeout: float = 10.0) -> None:
        if not valid_namespace(ns):
            raise ClientInputError(f"namespace {ns!r}: use 1-64 letters, digits, '_', '.' or '-'")
        self.url = url
        self.ns = ns
        self.keys = Keys(ns)
        # Reads give up after this long, so a hung server cannot hang the caller; blocking
        # reads are kept shorter than it (see read_questions).
        self._socket_timeout = timeout + 30
        if connection is not None:
            self.redis = connection
        else:
            try:
                self.redis = redis.Redis.from_url(url, socket_connect_timeout=timeout,
                                                  socket_timeout=self._socket_timeout)
            except ValueError as exc:
                raise ClientInputError(f"bad Redis URL: {exc}") from None

    def close(self) -> None:
        self.redis.close()

    def __enter__(self) -> Client:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    # -- producers -------------------------------------------------------------------------
    def push_item(self, key: str, side: str | None = None) -> str:
        """Add one item (``side`` pins it to a known label); returns the entry id."""
        return _text(self.redis.xadd(self.keys.items, item_fields(key, side)))

    def push_items(self, items: Iterable[Any]) -> int:
        """Add many items (keys, ``(key, side)`` pairs or ``{"key", "side"}`` maps)."""
        entries = [as_item_fields(it) for it in items]
        self._xadd_many(self.keys.items, entries)
        return len(entries)

    def push_answer(self, a: str, b: str, same: bool, source: str | None = None,
                    qid: str | None = None, aid: str | None = None) -> str:
        """Add one answer; ``aid`` makes a retried push safe (the repeat is not counted)."""
        return _text(self.redis.xadd(self.keys.answers,
                                     answer_fields(a, b, same, source, qid, aid)))

    def push_answers(self, answers: Iterable[Any], packed: bool = False,
                     columns: bool = False) -> int:
        """Add many answers (maps, ``Answer`` objects or tuples); returns how many.

        ``packed=True`` writes them as few ``pack`` entries as the contract's limits allow,
        which is several times cheaper for the worker to read; with ``columns=True`` too,
        as column packs, cheaper still (they need a worker of this version or newer). A bad
        element means nothing is sent; a connection lost midway may leave a prefix written,
        so give answers an ``aid`` if you may retry (repeats are then not counted).
        """
        entries = [as_answer_fields(a) for a in answers]
        if packed:
            packs = pack_answer_columns(entries) if columns else pack_answers(entries)
            self._xadd_many(self.keys.answers, [{"pack": p} for p in packs])
        else:
            self._xadd_many(self.keys.answers, entries)
        return len(entries)

    def _xadd_many(self, stream: str, entries: Sequence[Mapping[str, Any]]) -> None:
        for i in range(0, len(entries), _PIPELINE_CHUNK):
            pipe = self.redis.pipeline(transaction=False)
            for fields in entries[i:i + _PIPELINE_CHUNK]:
                pipe.xadd(stream, dict(fields))
            pipe.execute()

    # -- readers ---------------------------------------------------------------------------
    def lookup(self, key: str) -> dict[str, Any] | None:
        """Where one item stands (side, status, llr, answers, rev, pinned), or None."""
        check_text(key, "item key", MAX_KEY_BYTES)
        raw = self.redis.hget(self.keys.assign, key)
        return None if raw is None else decode_record(key, raw)

    def lookup_many(self, keys: Sequence[str]) -> list[dict[str, Any] | None]:
        """Like :meth:`lookup` for many keys, in one round trip; same order as ``keys``."""
        keys = list(keys)
        for k in keys:
            check_text(k, "item key", MAX_KEY_BYTES)
        if not keys:
            return []
        raws = self.redis.hmget(self.keys.assign, keys)
        return [None if r is None else decode_record(k, r) for k, r in zip(keys, raws, strict=True)]

    def assignments(self, count: int = 1000) -> Iterator[dict[str, Any]]:
        """Every item's record, in no particular order (HSCAN: safe on a live deployment;
        an item changed during the scan may appear with its old or its new record)."""
        for field, raw in self.redis.hscan_iter(self.keys.assign, count=count):
            yield decode_record(_text(field), raw)

    def count_assignments(self) -> int:
        return int(self.redis.hlen(self.keys.assign))

    def status(self) -> dict[str, Any]:
        """A read-only summary: items by status, spend, outstanding questions, dead letters,
        stream lengths with consumer-group lag and pending, and the learned noise."""
        return read_status(self)

    # -- crowd adapters --------------------------------------------------------------------
    def ensure_group(self, group: str, start: str = "0") -> None:
        """Create the adapter's consumer group on ``{NS}:questions`` if it is missing.

        ``start="0"`` hands the new group every question still in the stream.
        """
        check_text(group, "group", MAX_ID_BYTES)
        try:
            self.redis.xgroup_create(self.keys.questions, group, id=start, mkstream=True)
        except redis.ResponseError as exc:
            if "BUSYGROUP" not in str(exc):
                raise

    def read_questions(self, group: str, consumer: str, count: int = 100, block_ms: int = 1000,
                       pending: bool = False) -> list[tuple[str, list[dict[str, Any]]]]:
        """One XREADGROUP: ``[(entry_id, [question, ...]), ...]``; acknowledge with
        :meth:`ack_questions` once the answers are safely written. ``pending=True`` rereads
        this consumer's delivered but unacknowledged entries (after a restart). ``block_ms``
        0 returns at once."""
        start = "0" if pending else ">"
        block_ms = min(int(block_ms), int((self._socket_timeout - 5) * 1000))
        # Redis reads BLOCK 0 as "forever"; here 0 means "do not wait".
        block = None if pending or block_ms <= 0 else block_ms
        resp = self.redis.xreadgroup(group, consumer, {self.keys.questions: start},
                                     count=count, block=block)
        out: list[tuple[str, list[dict[str, Any]]]] = []
        for _stream, entries in resp or []:
            for entry_id, fields in entries:
                # A pending entry trimmed from the stream comes back without fields: it is
                # returned with no questions so that the caller acknowledges it away.
                out.append((_text(entry_id), decode_questions(fields) if fields else []))
        return out

    def ack_questions(self, group: str, entry_ids: Sequence[str]) -> int:
        return int(self.redis.xack(self.keys.questions, group, *entry_ids)) if entry_ids else 0

    def questions(self, group: str, consumer: str, block_ms: int = 1000, count: int = 100,
                  stop_when_idle: bool = False) -> Iterator[dict[str, Any]]:
        """Yield questions (``qid``, ``a``, ``b``, ``why``, ``ts``) for a crowd adapter.

        An entry is acknowledged once all its questions were yielded and the caller asked
        for the next one, so a crash while handling a question leaves it pending; the next
        run of the same consumer gets it again first. Show a person only ``a`` and ``b``.
        ``stop_when_idle`` ends the iteration after one read that returns nothing.
        """
        self.ensure_group(group)
        first = True
        while True:
            batch = self.read_questions(group, consumer, count, block_ms, pending=first)
            if first and not batch:
                first = False
                continue
            if not batch:
                if stop_when_idle:
                    return
                continue
            for entry_id, qs in batch:
                yield from qs
                self.ack_questions(group, [entry_id])
            if first and len(batch) < count:
                first = False


def _number(v: Any) -> Any:
    s = _text(v)
    for conv in (int, float):
        try:
            return conv(s)
        except (TypeError, ValueError):
            pass
    return s


def _groups(r: redis.Redis, stream: str) -> list[dict[str, Any]]:
    """XINFO GROUPS of one stream (empty when the stream does not exist yet)."""
    try:
        info = r.xinfo_groups(stream)
    except redis.ResponseError:
        return []
    out = []
    for g in info:
        g = {_text(k): _text(v) for k, v in g.items()}
        out.append({"group": g.get("name"), "consumers": g.get("consumers"),
                    "pending": g.get("pending"), "lag": g.get("lag"),
                    "last_delivered": g.get("last-delivered-id")})
    return out


def read_status(client: Client) -> dict[str, Any]:
    """What :meth:`Client.status` returns; every read, no write."""
    r, k = client.redis, client.keys
    meta = {_text(a): _number(b) for a, b in r.hgetall(k.meta).items()}
    items = {s: meta.get(f"items_{s}") for s in STATUSES}
    spend, outstanding, as_of = meta.get("spend"), meta.get("outstanding"), None
    if all(v is None for v in items.values()):
        # The worker's progress samples carry the counts, spend and questions in flight.
        last = r.xrevrange(k.history, count=1)
        if last:
            sample = {_text(a): _number(b) for a, b in last[0][1].items()}
            items = {s: sample.get(s) for s in STATUSES}
            spend = sample.get("spend", spend)
            outstanding = sample.get("outstanding", outstanding)
            as_of = sample.get("ts")
    if all(v is None for v in items.values()):
        # No summary from a worker yet: count the records themselves.
        counts = dict.fromkeys(STATUSES, 0)
        for rec in client.assignments():
            counts[rec["status"]] = counts.get(rec["status"], 0) + 1
        items = counts
    sources = []
    for name, raw in r.hgetall(k.noise).items():
        try:
            value = msgpack.unpackb(raw, raw=False)
        except (ValueError, msgpack.UnpackException):
            continue
        row = value if isinstance(value, dict) else {"delta": value}
        sources.append({"source": _text(name), **row})
    sources.sort(key=lambda s: -(s.get("answers") or 0))
    streams = {}
    for name in ("items", "answers", "questions"):
        key = getattr(k, name)
        streams[name] = {"length": int(r.xlen(key)), "groups": _groups(r, key)}
    return {
        "ns": client.ns,
        "items": items,
        "spend": spend,
        "questions_outstanding": outstanding,
        "as_of_ms": as_of,  # time of the progress sample read, when that was the source
        "dead_letters": int(r.xlen(k.dead)),
        "meta": meta,
        "streams": streams,
        "sources": sources,
    }
