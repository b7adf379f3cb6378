"""A corpus of malformed input entries, and the scenario that feeds it to a live worker.

Each case is one entry (or one pack) a careless or hostile producer could write. The
scenario interleaves them with good entries, runs ``streamgroup run`` as a process, and
checks: every bad entry (or bad pack element) is in ``{NS}:dead`` with a readable reason
and its own origin, every good entry is applied, and the worker is still running
afterwards. Used by ``tests/test_badinput.py`` and ``scripts/fault_matrix.py``.
"""

from __future__ import annotations

import tempfile
from dataclasses import dataclass
from typing import Any

import msgpack

from streamgroup.keys import MAX_PACK_ANSWERS, MAX_PACK_BYTES, Keys
from tests.faultkit import Result, WorkerProc, consumed, probe, server, wait_for

NS = "bad"
K = Keys(NS)
ITEMS = [f"shard-{i:06d}" for i in range(12)]
PINNED = [("shard-100000", "north"), ("shard-100001", "south")]


def _pk(obj: Any) -> bytes:
    return msgpack.packb(obj, use_bin_type=True)


def _good(i: int) -> dict[str, Any]:
    """A valid answer no other entry repeats (distinct pair and source)."""
    return {"a": ITEMS[i % 12], "b": ITEMS[(i * 5 + 1) % 12] if (i * 5 + 1) % 12 != i % 12
            else ITEMS[(i + 1) % 12], "same": str(i % 2), "source": f"good-{i}"}


def _nested(depth: int) -> bytes:
    """msgpack bytes of ``[[[...["x"]...]]]`` (built by hand: the packer stops at 512)."""
    return b"\x91" * depth + b"\xa1x"


@dataclass(frozen=True)
class Case:
    """One malformed entry: ``stream`` is ``items`` or ``answers``; ``expect`` a reason part.

    ``index`` is set for a pack with good and bad elements: the bad element's position
    (its dead letter's origin ends in ``#index``); the good elements must be applied.
    """

    kind: str
    stream: str
    fields: dict[str, Any]
    expect: str
    index: int | None = None
    good_in_pack: int = 0


CASES: list[Case] = [
    Case("item without key", "items", {"kee": "shard-9"}, "missing field key"),
    Case("item key empty", "items", {"key": ""}, "key must be 1 to 256 bytes"),
    Case("item key over 256 bytes", "items", {"key": "k" * 257}, "key must be 1 to 256"),
    Case("item key invalid UTF-8", "items", {"key": b"shard-\xff\xfe"}, "not valid UTF-8"),
    Case("item key with a control character", "items", {"key": "shard\t1"}, "control"),
    Case("item side over 64 bytes", "items", {"key": "shard-200000", "side": "s" * 65},
         "side must be 1 to 64"),
    Case("unknown side label (a third group)", "items", {"key": "shard-200001",
                                                         "side": "east"}, "third"),
    Case("answer without a", "answers", {"b": ITEMS[0], "same": "1"}, "missing field a"),
    Case("answer without same", "answers", {"a": ITEMS[0], "b": ITEMS[1]},
         "missing field same"),
    Case("answer with only unknown fields", "answers", {"colour": "red"},
         "missing field a, b, same"),
    Case("a == b", "answers", {"a": ITEMS[2], "b": ITEMS[2], "same": "1"}, "same item"),
    Case("same is 'yes'", "answers", {"a": ITEMS[0], "b": ITEMS[3], "same": "yes"},
         "same must be 1 or 0"),
    Case("same is 2", "answers", {"a": ITEMS[0], "b": ITEMS[3], "same": "2"},
         "same must be 1 or 0"),
    Case("same is NaN", "answers", {"a": ITEMS[0], "b": ITEMS[3], "same": "nan"},
         "same must be 1 or 0"),
    Case("same is a huge number", "answers", {"a": ITEMS[0], "b": ITEMS[3],
                                             "same": "1" + "0" * 400}, "same must be 1 or 0"),
    Case("a invalid UTF-8", "answers", {"a": b"\xc3\x28", "b": ITEMS[1], "same": "1"},
         "not valid UTF-8"),
    Case("a over 256 bytes", "answers", {"a": "k" * 300, "b": ITEMS[1], "same": "1"},
         "a must be 1 to 256 bytes"),
    Case("b with a C1 control character", "answers", {"a": ITEMS[1], "b": "shard\u0085",
                                                      "same": "0"}, "control"),
    Case("source over 128 bytes", "answers", {"a": ITEMS[1], "b": ITEMS[4], "same": "1",
                                              "source": "s" * 129}, "source must be 1 to 128"),
    Case("qid empty", "answers", {"a": ITEMS[1], "b": ITEMS[4], "same": "1", "qid": ""},
         "qid must be 1 to 128"),
    Case("unknown qid", "answers", {"a": ITEMS[1], "b": ITEMS[4], "same": "1",
                                    "source": "bad-q", "qid": "999999999"}, "qid"),
    Case("aid over 128 bytes", "answers", {"a": ITEMS[1], "b": ITEMS[4], "same": "1",
                                           "aid": "x" * 129}, "aid must be 1 to 128"),
    Case("broken msgpack", "answers", {"pack": b"\xc1\xc1\xc1"}, "not valid msgpack"),
    Case("truncated msgpack", "answers", {"pack": _pk([{"a": "p", "b": "q", "same": 1}])[:-3]},
         "not valid msgpack"),
    Case("pack is a map without answer columns", "answers", {"pack": _pk({"a": "p"})},
         "a column pack needs the arrays a, b and same"),
    Case("column pack with arrays of different lengths", "answers",
         {"pack": _pk({"a": ["p", "q"], "b": ["r"], "same": [1, 0]})},
         "must all have the same length"),
    Case("pack is a string", "answers", {"pack": _pk("shard-000001")},
         "must be a msgpack array of answers or a map of answer columns"),
    Case("pack is an empty array", "answers", {"pack": _pk([])}, "empty array"),
    Case("pack with an extra field", "answers", {"pack": _pk([{"a": ITEMS[0], "b": ITEMS[5],
                                                               "same": 1}]), "x": "1"},
         "carries only the field pack"),
    Case("pack over 1 MiB", "answers", {"pack": _pk(["x" * (MAX_PACK_BYTES + 10)])},
         "the limit is"),
    Case("pack of more than 10,000 answers", "answers",
         {"pack": _pk([{"a": "p", "b": "q", "same": 1}] * (MAX_PACK_ANSWERS + 1))},
         "more than 10000"),
    Case("deeply nested pack (depth 2000)", "answers", {"pack": _nested(2000)},
         "msgpack"),
    Case("pack map with 40 keys", "answers",
         {"pack": _pk([{f"k{j}": j for j in range(40)}])}, "within the limits"),
    Case("pack with an ext type", "answers", {"pack": _pk([msgpack.ExtType(5, b"zz")])},
         "msgpack"),
    Case("pack element not a map", "answers",
         {"pack": _pk([{"a": ITEMS[6], "b": ITEMS[7], "same": 1, "source": "gp-1"}, 42])},
         "must be a map", index=1, good_in_pack=1),
    Case("pack element a == b", "answers",
         {"pack": _pk([{"a": ITEMS[8], "b": ITEMS[8], "same": 0},
                       {"a": ITEMS[6], "b": ITEMS[9], "same": True, "source": "gp-2"}])},
         "same item", index=0, good_in_pack=1),
    Case("pack element same NaN", "answers",
         {"pack": _pk([{"a": ITEMS[6], "b": ITEMS[10], "same": 0, "source": "gp-3"},
                       {"a": ITEMS[6], "b": ITEMS[11], "same": float("nan")}])},
         "same must be", index=1, good_in_pack=1),
    Case("pack element same huge (2**63)", "answers",
         {"pack": _pk([{"a": ITEMS[7], "b": ITEMS[9], "same": 2 ** 63}])},
         "same must be", index=0),
    Case("pack element key is a number", "answers",
         {"pack": _pk([{"a": 12345, "b": ITEMS[9], "same": 1}])}, "must be a string",
         index=0),
    Case("pack element value nested deep", "answers",
         {"pack": b"\x91\x83\xa1a" + _nested(50) + b"\xa1b\xa1q\xa4same\x01"},
         "must be a string", index=0),
    Case("pack element with invalid UTF-8 bytes", "answers",
         {"pack": _pk([{"a": b"\xff\xfe", "b": ITEMS[9], "same": 1}])}, "not valid UTF-8",
         index=0),
]


def _origin(eid: bytes, case: Case) -> str:
    base = f"{K.answers if case.stream == 'answers' else K.items} {eid.decode()}"
    return base if case.index is None else f"{base}#{case.index}"


def bad_input(cases: list[Case] = CASES) -> Result:
    """Feed every case between good entries to a live worker; check dead letters and applies."""
    res = Result(f"malformed entries ({len(cases)} kinds) mixed with good ones")
    with server() as srv, tempfile.TemporaryDirectory() as tmp:
        r = probe(srv)
        w = WorkerProc(srv.url, NS, tmp, batch=7, inflight=1)
        pipe = r.pipeline(transaction=False)
        for key in ITEMS:
            pipe.xadd(K.items, {"key": key})
        for key, side in PINNED:
            pipe.xadd(K.items, {"key": key, "side": side})
        pipe.execute()
        # a real qid, answered twice: the repeat is a duplicate (counted, not applied)
        q = wait_for(lambda: r.xrange(K.questions, count=1) or not w.alive(), 30,
                     "a first question")
        assert w.alive(), f"the worker exited {w.proc.returncode}: {w.log()[-2000:]}"
        qf = q[0][1]
        reused = {"a": qf[b"a"], "b": qf[b"b"], "same": "1", "qid": qf[b"qid"],
                  "source": "q-first"}
        ids: list[tuple[bytes, Case]] = []
        good = 1
        r.xadd(K.answers, reused)
        for i, case in enumerate(cases):
            for j in range(2):
                r.xadd(K.answers, _good(3 * i + j))
                good += 1
            ids.append((r.xadd(K.items if case.stream == "items" else K.answers,
                               case.fields), case))
            good += case.good_in_pack
        r.xadd(K.answers, {**reused, "source": "q-second"})
        last = r.xadd(K.items, {"key": "shard-999999"})  # after all the bad ones
        wait_for(lambda: (r.hexists(K.assign, "shard-999999") and consumed(r, NS))
                 or not w.alive(), 60, "every entry, bad or good, to be consumed")
        alive = w.alive()
        dead = {f[b"origin"].decode(): f for _, f in r.xrange(K.dead)}
        meta = {f.decode(): v.decode() for f, v in r.hgetall(K.meta).items()}
        rows, missing = [], []
        for eid, case in ids:
            d = dead.get(_origin(eid, case))
            reason = d[b"reason"].decode() if d else None
            ok = reason is not None and case.expect in reason
            rows.append({"kind": case.kind, "reason": reason, "ok": ok})
            if not ok:
                missing.append(case.kind)
        code = w.stop()
        applied = int(meta.get("applied", 0))
        dup_qid = int(meta.get("dup:qid", 0))
        res.details.update(cases=len(cases), dead_letters=len(dead), good_answers=good,
                           applied=applied, dup_qid=dup_qid, alive_after=alive,
                           exit_code=code, wrong=missing, rows=rows,
                           last_item=last.decode())
        res.passed = (not missing and applied == good and dup_qid == 1 and alive
                      and code == 0 and len(dead) == len(cases))
        res.outcome = (f"{len(cases) - len(missing)}/{len(cases)} dead-lettered with the "
                       f"expected reason; {applied}/{good} good answers applied; reused qid "
                       f"counted as duplicate ({dup_qid}); worker "
                       + ("kept running" if alive else "STOPPED"))
    return res
