"""Building the one MULTI/EXEC that commits a batch, and sending it.

Order inside the transaction (MULTI/EXEC: other clients see all of it or none of it):

1. ``HSET {NS}:assign`` for every record that changed;
2. ``XADD {NS}:decisions`` for records whose side or status changed (``MAXLEN ~``; from
   ``DECISIONS_BY_SCRIPT`` of them in one batch, one script that appends them all);
3. ``XADD {NS}:questions``: one entry per question, or entries with a ``pack`` field;
4. ``XADD {NS}:dead`` for rejected entries;
5. the journal entry (``XADD {NS}:journal``) - or, when it is time, the snapshot: ``SET
   {NS}:snapnext``, then one small script (``SNAPSHOT_IF_NEWER``) renames it to
   ``{NS}:snapshot``, unlinks ``{NS}:journal`` (the snapshot then covers this batch too)
   and records the batch number in ``{NS}:snapseq``, unless a snapshot of that batch or a
   later one is stored already;
6. ``HSET {NS}:meta`` with absolute counter values (idempotent);
7. ``XACK`` of every consumed input entry, then a trim of the input stream (below);
8. the renewal of the worker's lease on the namespace (``stream/lease.py``).

A timed plan (``timed=True``) starts and ends with ``TIME``: :func:`receive` strips both
replies and keeps their difference, Redis's own time inside the transaction, as
``plan.held_us`` (the worker sizes its reads by it: ``stream/sizing.py``).

Many entries of one stream (plain questions, decisions) are plain ``XADD`` commands
formatted as RESP for the whole batch at once (:class:`Prepacked`; :func:`xadd_entries`
in general, specialised from the columns for questions and decisions):
Redis parses queued commands before EXEC, whereas a script calling XADD does all its work
inside the transaction, about three times the server time per entry. Scripts go as
``EVAL`` (not ``EVALSHA``), so a script cache emptied by a Redis restart can never fail one
command of a transaction.

Trimming the inputs: after the XACK, a small script (``TRIM_INPUT``) trims the input stream
with ``XTRIM MINID`` just below the oldest entry that any consumer group on it still needs
(its oldest pending entry, or the entry after its last-delivered id when nothing is
pending). So an entry is removed only once every group has acknowledged it - including
groups other tools may have added - and Redis memory does not grow with history.
(``XDEL`` of the acknowledged ids did the same at about four times the server time.)
Output streams are capped with approximate ``MAXLEN`` (settings ``questions_maxlen``,
``decisions_maxlen``, ``dead_maxlen``): a reader that falls further behind than the cap
loses the oldest entries (a lost question is simply re-issued after the question timeout).
"""

from __future__ import annotations

import functools
import itertools
import operator
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import hiredis
import msgpack
import numpy as np
import redis

from ..core.packing import array_head, str_head
from ..core.types import QuestionColumns, Record, RecordColumns
from ..errors import StreamgroupError
from ..keys import MAX_ID_BYTES, MAX_KEY_BYTES, MAX_PACK_ANSWERS, QUESTION_FIELDS, Keys
from .codec import Dead

try:  # redis-py's hiredis parser and its "no complete reply yet" marker, to read directly
    from redis._parsers.hiredis import NOT_ENOUGH_DATA as _NOT_ENOUGH_DATA
    from redis._parsers.hiredis import _HiredisParser
except ImportError:  # pragma: no cover - another redis-py layout: replies one by one
    _NOT_ENOUGH_DATA = _HiredisParser = None

Command = tuple[Any, ...]

_packb = msgpack.Packer(use_bin_type=True).pack


def assign_value(r: Record) -> bytes:
    """The documented ``{NS}:assign`` value: a msgpack map (one record; see below)."""
    return _packb({"side": r.side, "status": r.status, "llr": float(r.llr),
                   "answers": int(r.answers), "rev": int(r.rev), "pinned": bool(r.pinned)})


# assign_values builds the same maps for a whole batch with numpy: a prefix per (side,
# status) pair (map header, "side", "status", the "llr" key and the float64 marker), then
# llr as big-endian float64, then "answers", "rev" and "pinned". Each integer column takes
# the shortest form that holds the batch's largest value (a positive fixint when all are
# below 128, as msgpack itself would write them; else uint16 or uint32: valid msgpack for
# any reader, just not always the shortest).
_KEYS = {name: _packb(name) for name in ("answers", "rev", "pinned")}


def _uint_column(values: np.ndarray) -> tuple[bytes, str]:
    """(msgpack marker, numpy dtype) for a column of non-negative integers."""
    top = int(values.max()) if len(values) else 0
    if top < 128:
        return b"", ">u1"
    if top < 1 << 16:
        return b"\xcd", ">u2"
    return b"\xce", ">u4"


def _prefix(side: str | None, status: str) -> bytes:
    return (b"\x86" + _packb("side") + _packb(side) + _packb("status") + _packb(status)
            + _packb("llr") + b"\xcb")


@functools.lru_cache(maxsize=16)
def _prefixes(labels: tuple[str, ...], status_names: tuple[str, ...]) -> list[bytes]:
    """``_prefix`` of every (side slot -1, 0, 1; status) pair, in the order of ``code``."""
    return [_prefix(side, status) for side in (None, *labels) for status in status_names]


def _assign_tails(rc: RecordColumns, suffix: bytes = b""
                  ) -> tuple[list[bytes], np.ndarray, np.ndarray]:
    """Every record's value in two parts: a prefix from a table (``_prefixes``), the
    record's index into it (``code``), and the record's tail (llr onwards, then ``suffix``)
    as a row of a uint8 matrix (all tails have one width)."""
    n = len(rc)
    prefixes = _prefixes(tuple(rc.labels), tuple(rc.status_names))
    code = (rc.side.astype(np.int64) + 1) * len(rc.status_names) + rc.status
    (a_marker, a_dtype), (r_marker, r_dtype) = _uint_column(rc.answers), _uint_column(rc.rev)
    dtype, template = _tail_layout(a_marker, a_dtype, r_marker, r_dtype, suffix)
    rows = np.empty(n, dtype=dtype)
    rows[...] = template  # the constants of every row at once
    rows["llr"] = rc.llr
    rows["answers"] = rc.answers
    rows["rev"] = rc.rev
    rows["pinned"] = np.where(rc.pinned, 0xC3, 0xC2)  # true / false
    return prefixes, code, rows.view(np.uint8).reshape(n, dtype.itemsize)


@functools.lru_cache(maxsize=64)
def _tail_layout(a_marker: bytes, a_dtype: str, r_marker: bytes, r_dtype: str,
                 suffix: bytes) -> tuple[np.dtype, np.ndarray]:
    """The structured dtype of a record's tail, and one row of it holding the constants.

    A row is a record of a structured dtype: each constant a bytes field, each column a
    field of its msgpack dtype (a field is written whole per row: a column of uint8 slices
    costs a strided copy per row and per byte width, about twice the time). Built once per
    kind of tail (the integer columns' widths), not per batch."""
    parts: list[tuple[bytes, str | None, str]] = [
        (b"", "llr", ">f8"), (_KEYS["answers"] + a_marker, "answers", a_dtype),
        (_KEYS["rev"] + r_marker, "rev", r_dtype), (_KEYS["pinned"], "pinned", "u1"),
        (suffix, None, "V0")]
    names: list[str] = []
    formats: list[str] = []
    offsets: list[int] = []
    consts: list[tuple[str, bytes]] = []
    at = 0
    for i, (const, col, fmt) in enumerate(parts):
        if const:
            names.append(f"c{i}")
            formats.append(f"V{len(const)}")
            offsets.append(at)
            consts.append((f"c{i}", const))
            at += len(const)
        if col is not None:
            names.append(col)
            formats.append(fmt)
            offsets.append(at)
            at += np.dtype(fmt).itemsize
    dtype = np.dtype({"names": names, "formats": formats, "offsets": offsets, "itemsize": at})
    template = np.zeros(1, dtype=dtype)
    for name, const in consts:
        template[name] = np.frombuffer(const, dtype=f"V{len(const)}")[0]
    template.flags.writeable = False  # shared by every batch through the cache
    return dtype, template


def _assign_parts(rc: RecordColumns, suffix: bytes = b""
                  ) -> tuple[list[bytes], list[int], list[bytes]]:
    """:func:`_assign_tails` as Python lists: codes as ints, tails as bytes."""
    prefixes, code, tail = _assign_tails(rc, suffix)
    # The tails as the rows of a fixed-width bytes array: numpy would drop trailing NULs
    # when it hands them out, but every tail ends in the pinned flag (0xC2 or 0xC3) or in
    # the suffix's LF.
    return prefixes, code.tolist(), tail.view(f"S{tail.shape[1]}").ravel().tolist()


def assign_values(rc: RecordColumns) -> list[bytes]:
    """``assign_value`` of every record of the columns, in order, without a loop per field."""
    if not len(rc):
        return []
    prefixes, code, tails = _assign_parts(rc)
    return list(map(operator.add, map(prefixes.__getitem__, code), tails))


def assign_command(key: str, rc: RecordColumns) -> bytes:
    """The ``HSET key`` of every record (item key, ``assign_value``) in RESP form, as
    :func:`resp_command` writes it, with no bytes object made per value: a record is its
    key's length line, the key, its value's length line and prefix (one per kind of
    prefix, the tails being of one width) and its tail with the closing CRLF, all joined
    once. When the keys all have one length in bytes (``rc.key_rows()``), the records are
    written by numpy instead, as rows of one width per kind of prefix: then the fields
    come grouped by kind of prefix (in order within each), which a hash does not mind."""
    keys = rc.key_rows() if len(rc) >= ROWS_MIN else None
    if keys is not None:
        return _assign_rows(key, rc, keys)
    keys = list(map(str.encode, rc.key_texts()))
    prefixes, code, tails = _assign_parts(rc, b"\r\n")
    width = len(tails[0]) - 2 if tails else 0
    leads = [b"\r\n$%d\r\n%s" % (len(p) + width, p) for p in prefixes]
    pieces: list[bytes] = [b""] * (4 * len(keys))
    pieces[0::4] = _bulk_heads(keys, b"\r\n")
    pieces[1::4] = keys
    pieces[2::4] = map(leads.__getitem__, code)
    pieces[3::4] = tails
    return _resp_start(("HSET", key), 2 * len(keys)) + b"".join(pieces)


# From this many records on, the numpy form of assign_command is the quicker one (measured
# with scripts/bench_batch.py: about even at 500 records, 2.1 against 5.8 ms at 20,000).
ROWS_MIN = 1000


def _assign_rows(key: str, rc: RecordColumns, keys: np.ndarray) -> bytes:
    """assign_command for keys of one length in bytes (``keys``: their bytes as rows): per
    kind of prefix, one uint8 matrix whose rows are whole records (key length line, key,
    value length line, prefix, tail)."""
    n, kw = keys.shape
    prefixes, code, tail = _assign_tails(rc, b"\r\n")
    width = tail.shape[1] - 2
    tw = tail.shape[1]
    key_cells = np.ascontiguousarray(keys).view(f"V{kw}").reshape(n)
    tail_cells = tail.view(f"V{tw}").reshape(n)
    head = np.frombuffer(b"$%d\r\n" % kw, dtype=np.uint8)
    out = [_resp_start(("HSET", key), 2 * n)]
    kinds = np.bincount(code, minlength=len(prefixes))
    for c in np.flatnonzero(kinds).tolist():
        rows = (code == c).nonzero()[0] if kinds[c] < n else slice(None)
        mid = np.frombuffer(b"\r\n$%d\r\n%s" % (len(prefixes[c]) + width, prefixes[c]),
                            dtype=np.uint8)
        a, b = len(head), len(head) + kw
        m = b + len(mid)
        # one record of a structured dtype per row, each part a bytes field written whole
        buf = np.empty(int(kinds[c]), dtype=np.dtype({
            "names": ["head", "key", "mid", "tail"],
            "formats": [f"V{a}", f"V{kw}", f"V{len(mid)}", f"V{tw}"],
            "offsets": [0, a, b, m], "itemsize": m + tw}))
        buf["head"] = head.view(f"V{a}")[0]
        buf["key"] = key_cells[rows]
        buf["mid"] = mid.view(f"V{len(mid)}")[0]
        buf["tail"] = tail_cells[rows]
        out.append(buf.tobytes())
    return b"".join(out)


DECISION_FIELDS = ("key", "side", "status", "llr", "answers", "rev")


def decision_values(rc: RecordColumns, positions: Sequence[int]) -> list[Any]:
    """The fields ``DECISION_FIELDS`` of the records at ``positions``, flat, row after row
    (key, side or "", status, llr as ``repr`` of a float, answers, rev). The reference of
    what a decision holds: the commit formats them straight from the columns
    (:func:`decision_entries`)."""
    idx = np.asarray(positions, dtype=np.int64)
    names = (*rc.labels, "")
    n = len(idx)
    vals: list[Any] = [None] * (6 * n)
    vals[0::6] = rc.key_texts(idx.tolist())
    vals[1::6] = map(names.__getitem__, rc.side[idx].tolist())
    vals[2::6] = map(rc.status_names.__getitem__, rc.status[idx].tolist())
    vals[3::6] = list(map(repr, rc.llr[idx].astype(np.float64).tolist()))
    vals[4::6] = rc.answers[idx].astype(np.int64).tolist()
    vals[5::6] = rc.rev[idx].astype(np.int64).tolist()
    return vals


@dataclass(frozen=True)
class Caps:
    """Approximate MAXLEN caps of the output streams (0 = uncapped)."""

    questions: int = 100_000
    decisions: int = 100_000
    dead: int = 100_000
    history: int = 10_000


# The snapshot goes in under a key of its own by a plain SET (Redis keeps the argument as
# it is: no copy), then this script renames it over the stored one, drops the journal it
# covers and records the batch number it covers - only if that number is above the stored
# one (otherwise it drops the newcomer). A transaction is all or nothing except after a
# cut AOF: Redis 7.0 (aof-load-truncated yes) keeps the commands before the cut and runs
# them at its next restart in front of a later transaction, which could otherwise put an
# older snapshot over a newer one (or over a redone batch's own) and drop the journal
# written since. Passing the snapshot itself to a script would copy it twice inside the
# transaction (measured: 24 ms for 11 MB, against 1 ms for SET). The UNLINK frees the
# journal in the background: no pause.
SNAPSHOT_IF_NEWER = """
local stored = tonumber(redis.call('GET', KEYS[3]) or '-1')
if tonumber(ARGV[1]) <= stored then
  redis.call('UNLINK', KEYS[4])
  return 0
end
redis.call('RENAME', KEYS[4], KEYS[1])
redis.call('UNLINK', KEYS[2])
redis.call('SET', KEYS[3], ARGV[1])
return 1
"""

# KEYS[1] = input stream. Runs after the batch's XACK in the same transaction; it takes no
# entry ids (passing hundreds of ids through Lua cost about as much server time as the XACK).
TRIM_INPUT = """
local function parse(id)
  local ms, seq = string.match(id, '^(%d+)-(%d+)$')
  return tonumber(ms), tonumber(seq)
end
local function less(a, b)
  local am, as = parse(a)
  local bm, bs = parse(b)
  return am < bm or (am == bm and as < bs)
end
local floor = nil
for _, g in ipairs(redis.call('XINFO', 'GROUPS', KEYS[1])) do
  local f = {}
  for i = 1, #g, 2 do f[g[i]] = g[i + 1] end
  local low
  if f['pending'] > 0 then
    low = redis.call('XPENDING', KEYS[1], f['name'])[2]
  else
    local ms, seq = parse(f['last-delivered-id'])
    low = string.format('%.0f-%.0f', ms, seq + 1)
  end
  if floor == nil or less(low, floor) then
    floor = low
  end
end
if floor ~= nil then
  redis.call('XTRIM', KEYS[1], 'MINID', floor)
end
return floor
"""


class CommitError(StreamgroupError):
    """Redis refused (part of) a batch's transaction: the state must be reloaded."""


@functools.cache
def xadd_script(names: tuple[str, ...]) -> str:
    """A script that appends entries with these fields: KEYS[1] = stream, ARGV[1] = cap
    (approximate MAXLEN, applied once at the end; 0 = none), then the values, row by row.
    The commit no longer uses it (see the module's docstring); tools and tests fill streams
    with it in one command, and the tests take it as the reference for what an entry holds.

    The field names are constants of the script text, so each row is one ``redis.call``
    with no table built (about 10% less server time per entry than a generic loop that
    builds the field table for every row).
    """
    for n in names:
        if not n.isidentifier():
            raise ValueError(f"field name {n!r} cannot be written into a script")
    fields = ", ".join(f"'{n}', ARGV[i + {j}]" for j, n in enumerate(names))
    return (f"local k = KEYS[1]\n"
            f"for i = 2, #ARGV, {len(names)} do\n"
            f"  redis.call('XADD', k, '*', {fields})\n"
            f"end\n"
            f"if ARGV[1] ~= '0' then redis.call('XTRIM', k, 'MAXLEN', '~', ARGV[1]) end\n"
            f"return (#ARGV - 1) / {len(names)}\n")


_DECISION_SCRIPT = xadd_script(DECISION_FIELDS)
# From this many decisions in one batch (a packed batch of 20,000 answers places about
# 3,000 items), one script appends them all. A plain XADD costs Redis about 3.7 us in all
# (parsed and queued, run, then freed) against 2.2-2.5 us for a row of the script, but
# the script's rows all run inside EXEC (1.3-1.5 us each against 0.75), where lookups
# wait: below this count the plain commands keep the transaction short, above it Redis's
# total time decides how many answers a second get through.
DECISIONS_BY_SCRIPT = 1000


@dataclass(frozen=True)
class Prepacked:
    """``count`` commands named ``name``, already in RESP form (formatted in one go)."""

    name: str
    blob: bytes
    count: int


assert QUESTION_FIELDS == ("qid", "a", "b", "why", "ts"), "_question_entries spells these out"


def _question_entries(key: str, cap: int, qc: QuestionColumns) -> list[Command | Prepacked]:
    """One plain ``XADD`` per question (fields ``QUESTION_FIELDS``), then one approximate
    trim of the stream to ``cap`` (0 = none).

    Plain commands rather than a script: Redis parses them as they are queued, before EXEC,
    and EXEC then only runs them, about a third less time inside the transaction than a
    script calling XADD (measured: 1.5 against 2.2-2.5 us per question on this machine), and
    the transaction is what a lookup waits behind. This is :func:`xadd_entries` specialised:
    a batch's questions share a few (why, ts) pairs, whose part of each row is formatted
    once per pair (about 0.4 against 0.9 us per question for a ``%`` per question).
    """
    leads = _field_leads(key, QUESTION_FIELDS)
    why_lead, ts_lead = leads[3][0], leads[4][0]

    def tail(why: str, ts: int) -> str:
        return f"{why_lead}{_utf8_len(why)}\r\n{why}\r\n{ts_lead}{len(str(ts))}\r\n{ts}"

    ts = qc.ts_ms
    if ts.count(ts[0]) == len(ts):  # one time for the batch (the usual case): keyed by why
        kinds: list[Any] = qc.why
        tails = {w: tail(w, ts[0]) for w in set(kinds)}
    else:
        kinds = list(zip(qc.why, ts, strict=True))
        tails = {wt: tail(*wt) for wt in set(kinds)}
    pieces: list[Any] = [None] * (7 * len(qc))
    pieces[1::7] = qc.qid
    pieces[3::7] = qc.a
    pieces[5::7] = qc.b
    pieces[6::7] = map(tails.__getitem__, kinds)

    def formatted(size: Callable[[str], int]) -> str:
        for at, col, lead in zip((0, 2, 4), (qc.qid, qc.a, qc.b), leads, strict=False):
            pieces[at::7] = _length_heads(lead, col, size)
        return "\r\n".join(pieces) + "\r\n"

    return _prepacked(key, cap, len(qc), formatted)


def _question_column_map(qc: QuestionColumns, i: int, j: int) -> dict[str, list[Any]]:
    """The column pack of questions ``i`` to ``j``, as a dict of lists (the reference)."""
    return {"qid": qc.qid[i:j], "a": qc.a[i:j], "b": qc.b[i:j], "why": qc.why[i:j],
            "ts": qc.ts_ms[i:j]}


# From this many questions in a batch on, its column packs are written from the engine's
# arrays (question_column_pack) rather than by msgpack from lists (made for it: qid and
# key strings). Measured for one pack, lists made and packed against the numpy form:
# 31 against 35 us at 100 questions, 43 against 37 at 150, 54 against 39 at 200, 121
# against 51 at 500, 2.7 against 0.42-0.45 ms at 10,000 (the form's fixed cost is about
# 30 us).
QUESTION_ROWS_MIN = 200


def question_column_pack(qc: QuestionColumns, i: int, j: int) -> bytes:
    """``_packb(_question_column_map(qc, i, j))``, byte for byte: written by numpy from the
    arrays of the engine's groups (:class:`QuestionColumns.Group`) when every part is one
    and the keys all have one length in bytes (``KeyIndex.key_rows``), else by msgpack
    from the lists."""
    pack = _question_column_rows(qc, i, min(j, len(qc)))
    return pack if pack is not None else _packb(_question_column_map(qc, i, j))


def _question_column_rows(qc: QuestionColumns, i: int, j: int) -> bytes | None:
    """The column pack of questions ``i`` to ``j`` (``j`` at most ``len(qc)``) as msgpack
    writes it, with no object made per question, or None when this form does not apply.

    A map of five arrays: ``qid`` the decimal text of each number (:func:`_decimal_strs`),
    ``a`` and ``b`` each key's str header (one for all: the keys have one length) and its
    UTF-8 bytes, gathered as matrix rows; ``why`` and ``ts`` the packed value of each
    group, repeated once per question of it.
    """
    parts = qc.parts
    if j <= i or not all(isinstance(p, QuestionColumns.Group) for p in parts):
        return None
    keys = parts[0].keys
    nums: list[np.ndarray] = []
    first: list[np.ndarray] = []
    second: list[np.ndarray] = []
    whys: list[bytes] = []
    times: list[bytes] = []
    at = 0
    for p in parts:
        k = len(p)
        lo, hi = max(i - at, 0), min(j - at, k)
        at += k
        if lo >= hi:
            continue
        if p.keys is not keys:
            return None
        nums.append(p.qid[lo:hi])
        first.append(p.shown[lo:hi])
        second.append(p.shown[k + lo:k + hi])
        whys.append(_packb(p.why) * (hi - lo))
        times.append(_packb(p.ts_ms) * (hi - lo))
    rows = keys.key_rows(np.concatenate(first + second))
    qids = _decimal_strs(np.concatenate(nums)) if rows is not None else None
    if qids is None:
        return None
    m, width = j - i, rows.shape[1]
    head = str_head(width)
    shown = np.empty((2 * m, len(head) + width), dtype=np.uint8)  # a's rows, then b's
    shown[:, :len(head)] = np.frombuffer(head, dtype=np.uint8)
    # the keys as one field of a record per row: a copy of about half the time of the
    # same copy into the uint8 columns
    fields = np.dtype([("head", f"V{len(head)}"), ("key", f"V{width}")])
    shown.view(fields).reshape(2 * m)["key"] = rows.view(f"V{width}").reshape(2 * m)
    count = array_head(m)
    return b"".join([b"\x85\xa3qid", count, *qids, b"\xa1a", count, shown[:m],
                     b"\xa1b", count, shown[m:], b"\xa3why", count, *whys,
                     b"\xa2ts", count, *times])


_POW10 = 10 ** np.arange(19, dtype=np.int64)  # 1 to 10**18


def _decimal_strs(nums: np.ndarray) -> list[np.ndarray] | None:
    """Each number's decimal text as a msgpack str (fixstr: at most 19 digits), in order,
    as uint8 matrices, one per run of numbers with the same count of digits (a batch's
    qids are consecutive: one run, or two across a power of ten); None for negative
    numbers, numbers not of a signed integer dtype, or more than a few runs."""
    if len(nums) == 0 or nums.dtype.kind != "i" or int(nums.min()) < 0:
        return None
    top = int(nums.max())
    digits = len(str(top))
    if digits == len(str(int(nums.min()))):
        runs = [(0, len(nums), digits)]
    else:
        width = 1 + (nums[:, None] >= _POW10[1:digits]).sum(axis=1)
        cuts = (np.flatnonzero(width[1:] != width[:-1]) + 1).tolist()
        if len(cuts) > 16:
            return None
        bounds = [0, *cuts, len(nums)]
        runs = [(lo, hi, int(width[lo])) for lo, hi in itertools.pairwise(bounds)]
    # (division of uint32 by a constant: several times quicker than of int64)
    nums = nums.astype(np.uint32 if top < 1 << 32 else np.uint64)
    out = []
    for lo, hi, d in runs:
        rest = nums[lo:hi]
        cols = np.empty((1 + d, hi - lo), dtype=nums.dtype)  # by column: contiguous rows
        cols[0] = 0xA0 | d  # fixstr of d bytes
        for c in range(d, 0, -1):  # the last digit first
            high = rest // 10
            np.subtract(rest, high * 10, out=cols[c])
            rest = high
        cols[1:] |= 48  # "0" + digit
        out.append(cols.T.astype(np.uint8, order="C"))
    return out


def xadd_entries(key: str, cap: int, names: Sequence[str],
                 values: Sequence[Any]) -> list[Command | Prepacked]:
    """One plain ``XADD key * name value ...`` per row of ``values`` (the values of
    ``names``, row after row, each written as ``str()`` writes it), then one approximate
    trim of the stream to ``cap`` (0 = none).

    Plain commands rather than a script calling XADD: Redis parses them as they are queued,
    before EXEC, and EXEC then only runs them. Measured on this machine with the slowlog at
    threshold 0: 1.3 against 3.9 us of server time per six-field entry, inside the
    transaction that a lookup waits behind. The whole batch is formatted as RESP by one
    join: each value, and before it the RESP up to its length, from a table by length
    (:func:`_field_leads`).
    """
    width = len(names)
    rows = len(values) // width
    assert rows * width == len(values), "values must fill whole rows"
    leads = _field_leads(key, tuple(names))
    texts = list(map(str, values))
    pieces: list[Any] = [None] * (2 * len(texts))
    pieces[1::2] = texts

    def formatted(size: Callable[[str], int]) -> str:
        for j, lead in enumerate(leads):
            pieces[2 * j::2 * width] = _length_heads(lead, texts[j::width], size)
        return "\r\n".join(pieces) + "\r\n"

    return _prepacked(key, cap, rows, formatted)


def decision_entries(key: str, cap: int, rc: RecordColumns,
                     positions: Sequence[int]) -> list[Command | Prepacked]:
    """What ``xadd_entries(key, cap, DECISION_FIELDS, decision_values(rc, positions))``
    writes, formatted from the columns: a row's side and status come as one piece from a
    table of their few pairs, its answers and rev from a table of small counts, so a row
    is seven pieces of one join, and only its key and llr are measured. From
    ``DECISIONS_BY_SCRIPT`` rows on, the same rows as the arguments of one ``EVAL`` of
    ``xadd_script(DECISION_FIELDS)`` instead (the module's docstring says why)."""
    n = len(positions)
    if n >= DECISIONS_BY_SCRIPT:
        head = _resp_start(("EVAL", _DECISION_SCRIPT, 1, key, cap), len(DECISION_FIELDS) * n)
        body = _measured(_decision_rows(_SCRIPT_LEADS, rc, positions))
        return [Prepacked("EVAL", head + body.encode(), 1)]
    return _prepacked(key, cap, n, _decision_rows(_field_leads(key, DECISION_FIELDS), rc,
                                                  positions))


def _decision_rows(leads: tuple[tuple[str, list[str]], ...], rc: RecordColumns,
                   positions: Sequence[int]) -> Callable[[Callable[[str], int]], str]:
    """The rows' values in RESP, each led by ``leads[j]`` (an XADD's field name, or only
    the ``$`` of a script's argument), as a function of the length measure (bytes)."""
    idx = np.asarray(positions, dtype=np.int64)
    keys = rc.key_texts(idx.tolist())
    llrs = list(map(repr, rc.llr[idx].astype(np.float64).tolist()))
    kinds = ((rc.side[idx].astype(np.int64) + 1) * len(rc.status_names)
             + rc.status[idx]).tolist()
    pieces: list[Any] = [None] * (7 * len(keys))
    pieces[1::7] = keys
    pieces[4::7] = llrs
    pieces[5::7] = _count_pieces(leads[4][0], rc.answers[idx])
    pieces[6::7] = _count_pieces(leads[5][0], rc.rev[idx])
    side_lead, status_lead = leads[1][0], leads[2][0]

    def formatted(size: Callable[[str], int]) -> str:
        pairs = [f"{side_lead}{size(side)}\r\n{side}\r\n{status_lead}{size(status)}\r\n{status}"
                 for side in ("", *rc.labels) for status in rc.status_names]  # by kind
        pieces[0::7] = _length_heads(leads[0], keys, size)
        pieces[2::7] = map(pairs.__getitem__, kinds)
        pieces[3::7] = _length_heads(leads[3], llrs, size)
        return "\r\n".join(pieces) + "\r\n"

    return formatted


_COUNT_TABLE = 4096  # counts below this are formatted from a table


def _count_piece(lead: str, count: int) -> str:
    """``lead``, then the count's length, CRLF and text (as ``str`` writes it)."""
    return f"{lead}{len(str(count))}\r\n{count}"


@functools.lru_cache(maxsize=16)
def _count_table(lead: str) -> list[str]:
    """``_count_piece`` of each count below ``_COUNT_TABLE``."""
    return [_count_piece(lead, v) for v in range(_COUNT_TABLE)]


def _count_pieces(lead: str, counts: np.ndarray) -> list[str]:
    """``_count_piece`` of each count (integers), from the table when all are in it."""
    values = counts.astype(np.int64)
    if len(values) and values.min() >= 0 and values.max() < _COUNT_TABLE:
        return list(map(_count_table(lead).__getitem__, values.tolist()))
    return [_count_piece(lead, v) for v in values.tolist()]


_LEAD_TABLE = max(MAX_KEY_BYTES, MAX_ID_BYTES) + 1  # lengths up to the longest key or id
# a script's arguments have no field names: each lead is only the length's "$"
_SCRIPT_LEADS = (("$", [f"${n}" for n in range(_LEAD_TABLE)]),) * len(DECISION_FIELDS)


@functools.lru_cache(maxsize=64)
def _field_leads(key: str, names: tuple[str, ...]) -> tuple[tuple[str, list[str]], ...]:
    """For an XADD to ``key`` with fields ``names``: per field, its lead - the RESP between
    the previous value's CRLF and this value's length (the command, the key and ``*``
    before the first field, then the field's name, then ``$``) - and a table of the lead
    followed by each length below ``_LEAD_TABLE``."""
    start = f"*{3 + 2 * len(names)}\r\n$4\r\nXADD\r\n{_bulk(key)}$1\r\n*\r\n"
    leads = [f"{start if j == 0 else ''}{_bulk(name)}$" for j, name in enumerate(names)]
    return tuple((lead, [f"{lead}{n}" for n in range(_LEAD_TABLE)]) for lead in leads)


def _length_heads(lead: tuple[str, list[str]], col: Sequence[str],
                  size: Callable[[str], int]) -> list[str]:
    """The lead of each value of ``col`` with its length, from the table when it can."""
    whole, table = lead
    try:
        return list(map(table.__getitem__, map(size, col)))
    except IndexError:  # a value longer than the table (not from the engine's checks)
        return [f"{whole}{size(v)}" for v in col]


def _prepacked(key: str, cap: int, count: int,
               formatted: Callable[[Callable[[str], int]], str]) -> list[Command | Prepacked]:
    """The ``count`` XADDs that ``formatted(size)`` writes (``size``: a text's length in
    bytes, as RESP counts), as one :class:`Prepacked`, then the trim of ``key`` to ``cap``
    (0 = none)."""
    out: list[Command | Prepacked] = [Prepacked("XADD", _measured(formatted).encode(),
                                                 count)]
    if cap:
        out.append(("XTRIM", key, "MAXLEN", "~", cap))
    return out


_BULK_HEADS = {b"": [b"$%d" % n for n in range(4096)],
               b"\r\n": [b"$%d\r\n" % n for n in range(4096)]}


def _measured(formatted: Callable[[Callable[[str], int]], str]) -> str:
    """``formatted(size)`` with lengths in bytes, as RESP counts them: lengths in characters
    while the text is ASCII (the usual case, measured once), in UTF-8 bytes otherwise."""
    text = formatted(len)
    return text if text.isascii() else formatted(_utf8_len)


def _bulk_heads(args: Sequence[bytes], end: bytes = b"") -> list[bytes]:
    """The length header (``$n``, then ``end``) of each arg, from a table when it can."""
    try:
        return list(map(_BULK_HEADS[end].__getitem__, map(len, args)))
    except IndexError:  # an arg of 4 KiB or more
        return [b"$%d%s" % (len(a), end) for a in args]


def _resp_start(head: Command, more: int) -> bytes:
    """The RESP of the command ``head`` followed by ``more`` args not written yet."""
    start = hiredis.pack_command(head)
    return b"*%d" % (len(head) + more) + start[start.index(b"\r\n"):]


def resp_command(head: Command, args: Sequence[bytes]) -> bytes:
    """The RESP form of the command ``*head, *args`` (``args``: bytes, often hundreds),
    as ``hiredis.pack_command`` writes it, about twice as fast: the args go in by one join
    on CRLF with each length header taken from a table."""
    start = _resp_start(head, len(args))
    if not args:
        return start
    pieces: list[bytes] = [b""] * (2 * len(args))
    pieces[1::2] = args
    pieces[0::2] = _bulk_heads(args)
    return start + b"\r\n".join(pieces) + b"\r\n"


def _utf8_len(text: str) -> int:
    return len(text.encode())


def _bulk(text: str) -> str:
    """One RESP bulk string (its length in bytes, as Redis counts)."""
    return f"${_utf8_len(text)}\r\n{text}\r\n"


def _xadd(key: str, cap: int, fields: Iterable[Any]) -> Command:
    if cap:
        return ("XADD", key, "MAXLEN", "~", cap, "*", *fields)
    return ("XADD", key, "*", *fields)


@dataclass
class CommitPlan:
    """The commands of one batch's transaction, built before anything is sent."""

    commands: list[Command | Prepacked] = field(default_factory=list)
    timed: bool = False  # the first and last commands are TIME (see the module doc)
    held_us: float | None = None  # set by receive() for a timed plan

    def __len__(self) -> int:
        return len(self.commands)

    def replies(self) -> int:
        """How many commands Redis will queue (one reply of EXEC each)."""
        return sum(c.count if isinstance(c, Prepacked) else 1 for c in self.commands)

    def names(self) -> list[str]:
        """The name of every command Redis will queue, in order (one per reply of EXEC)."""
        out: list[str] = []
        for c in self.commands:
            if isinstance(c, Prepacked):
                out += [c.name] * c.count
            else:
                out.append(str(c[0]))
        return out

    def pieces(self) -> list[bytes]:
        """The commands in RESP form, one piece each, as sent between MULTI and EXEC."""
        return [c.blob if isinstance(c, Prepacked) else hiredis.pack_command(c)
                for c in self.commands]

    def packed(self) -> bytes:
        """The commands in RESP form, joined."""
        return b"".join(self.pieces())


def build_commit(
    keys: Keys,
    caps: Caps,
    *,
    records: RecordColumns | None,
    decisions: Sequence[int],
    questions: QuestionColumns | None,
    dead: Sequence[Dead],
    journal: bytes | None,
    snapshot: tuple[bytes, int] | None,
    meta: Mapping[str, Any],
    acks: Mapping[str, Sequence[bytes]],
    group: str,
    pack_questions: bool,
    epoch: str | None = None,
    lease: Command | None = None,
    question_columns: bool = False,
    timed: bool = False,
) -> CommitPlan:
    """All commands of a batch's MULTI/EXEC, in the documented order (``lease``, the
    renewal of the worker's lease, goes last: its reply is the last of EXEC's once
    :func:`receive` has taken the ``TIME`` replies of a timed plan off both ends)."""
    cmds: list[Command | Prepacked] = [_TIME] if timed else []
    if epoch is not None:
        cmds.append(("SET", keys.epoch, epoch))
    if records is not None and len(records):
        cmds.append(Prepacked("HSET", assign_command(keys.assign, records), 1))
    if decisions:
        assert records is not None
        cmds += decision_entries(keys.decisions, caps.decisions, records, decisions)
    if questions is not None and len(questions):
        qc = questions
        if pack_questions:
            by_rows = question_columns and len(qc) >= QUESTION_ROWS_MIN
            for i in range(0, len(qc), MAX_PACK_ANSWERS):
                j = i + MAX_PACK_ANSWERS
                if by_rows:  # the same bytes, written from the engine's arrays
                    pack = question_column_pack(qc, i, j)
                elif question_columns:  # a map of arrays: far cheaper to write and read
                    pack = _packb(_question_column_map(qc, i, j))
                else:
                    pack = _packb([{"qid": q, "a": a, "b": b, "why": w, "ts": t}
                                   for q, a, b, w, t in zip(qc.qid[i:j], qc.a[i:j], qc.b[i:j],
                                                            qc.why[i:j], qc.ts_ms[i:j],
                                                            strict=True)])
                cmds.append(_xadd(keys.questions, caps.questions, ("pack", pack)))
        else:
            cmds += _question_entries(keys.questions, caps.questions, qc)
    for d in dead:
        flat = []
        for k, v in d.to_fields().items():
            flat.append(k)
            flat.append(v)
        cmds.append(_xadd(keys.dead, caps.dead, flat))
    if snapshot is not None:
        blob, covers = snapshot
        cmds.append(("SET", keys.snapshot_next, blob))
        cmds.append(("EVAL", SNAPSHOT_IF_NEWER, 4, keys.snapshot, keys.journal,
                     keys.snapshot_seq, keys.snapshot_next, covers))
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
            cmds.append(Prepacked("XACK", resp_command(("XACK", stream, group), ids), 1))
            cmds.append(("EVAL", TRIM_INPUT, 1, stream))
    if lease is not None:
        cmds.append(lease)
    if timed:
        cmds.append(_TIME)
    return CommitPlan(cmds, timed=timed)


_TIME: Command = ("TIME",)


def send(client: redis.Redis, plan: CommitPlan, first: Command | None = None) -> None:
    """Write the plan as one MULTI/EXEC without waiting for the reply (see :func:`receive`).

    Packed and sent in one write, with ``first`` (if given) before MULTI: its reply comes
    first, and the caller reads it (``read_response``) before calling :func:`receive`. The
    worker puts its next XREADGROUP there rather than behind EXEC: Redis reads a large
    write in parts and serves other clients between them, so a lookup waits behind the
    read or behind the transaction, not behind both run back to back. Replies are read
    straight from the connection, since redis-py's pipeline costs several microseconds per
    command. Nothing else may use the connection until those replies have been read.
    """
    conn = client.connection
    if conn is None:
        raise RuntimeError("the worker's client must be a single-connection client")
    blob = b"".join([*((hiredis.pack_command(first),) if first is not None else ()),
                     _MULTI, *plan.pieces(), _EXEC])  # one copy of the commands, not two
    conn.send_packed_command([blob], check_health=False)


_MULTI = hiredis.pack_command(("MULTI",))
_EXEC = hiredis.pack_command(("EXEC",))


def _replies(conn: Any, count: int) -> list[Any]:
    """The next ``count`` replies on the connection; error replies as exception values.

    Read straight from redis-py's hiredis reader when there is one (a batch queues hundreds
    of commands, and ``read_response`` costs microseconds each), else one by one.
    """
    parser = getattr(conn, "_parser", None)
    reader = getattr(parser, "_reader", None)
    if _HiredisParser is None or type(parser) is not _HiredisParser or reader is None:
        out: list[Any] = []
        for _ in range(count):
            try:
                out.append(conn.read_response())
            except redis.ResponseError as exc:
                out.append(exc)
        return out
    out = []
    gets = reader.gets
    while True:
        # the replies already in the reader's buffer, gathered without a Python-level step
        # per reply (iter() stops at the "no complete reply yet" marker)
        got = list(itertools.islice(iter(gets, _NOT_ENOUGH_DATA), count - len(out)))
        if _any_error(got):
            lost = [x for x in got if isinstance(x, ConnectionError)]
            if lost:
                raise lost[0]
        out += got
        if len(out) >= count:
            return out
        parser.read_from_socket()


def receive(client: redis.Redis, plan: CommitPlan) -> list[Any]:
    """Read the replies of a sent plan and return EXEC's.

    Any error reply - at queueing time (EXEC then aborts and nothing is applied) or inside
    EXEC (Redis does not roll back the other commands) - raises :class:`CommitError`; the
    caller then stops, and the next start reloads the state from Redis.
    """
    conn = client.connection
    assert conn is not None
    got = _replies(conn, plan.replies() + 2)  # MULTI's OK, one QUEUED each, then EXEC's
    result = got[-1]
    queued = [str(x) for x in got[:-1] if isinstance(x, Exception)] if _any_error(
        got[:-1]) else []
    if isinstance(result, Exception):
        raise CommitError(f"the batch transaction was refused: {result}; "
                          f"queueing errors: {queued}")
    if result is None:
        raise CommitError("the batch transaction was aborted")
    if queued or _any_error(result):
        names = plan.names()
        bad = [f"{names[i]}: {x}" for i, x in enumerate(result) if isinstance(x, Exception)]
        raise CommitError(f"commands of the batch transaction failed: {bad or queued}")
    if plan.timed:
        plan.held_us = _elapsed_us(result[0], result[-1])
        return list(result[1:-1])
    return list(result)


def _elapsed_us(start: Sequence[bytes], end: Sequence[bytes]) -> float:
    """Microseconds between two replies of TIME (seconds and microseconds, as text)."""
    return (int(end[0]) - int(start[0])) * 1e6 + int(end[1]) - int(start[1])


def _any_error(replies: Sequence[Any]) -> bool:
    """Whether any reply is an error (checked by the few types present, not reply by reply:
    a batch's transaction has hundreds of replies)."""
    return any(issubclass(t, Exception) for t in set(map(type, replies)))


def execute(client: redis.Redis, plan: CommitPlan) -> list[Any]:
    """Send the plan as one MULTI/EXEC and wait for its result."""
    send(client, plan)
    return receive(client, plan)
