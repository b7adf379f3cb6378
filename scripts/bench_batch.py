"""Where the worker's CPU goes per answer, in-process and without Redis.

    python scripts/bench_batch.py --json            # plain one-answer entries
    python scripts/bench_batch.py --packed --json   # packed entries of 10,000 answers

A closed loop like the stream benchmark's, but with no server: a simulated crowd answers
the engine's questions, each batch of answer entries (built as the worker reads them raw
from XREADGROUP) goes through ``stream.batch.process`` and ``stream.commit.build_commit``,
and the commands are packed to bytes as ``commit.send`` would. Timings are per answer,
after a warm-up past the bootstrap, with a breakdown by phase (the phases are wrapped with
a timer, which costs a little itself). Figures move with the machine's load: compare runs
made side by side.
"""

from __future__ import annotations

import argparse
import collections
import json
import os
import sys
import time
from collections.abc import Callable
from typing import Any

import hiredis
import msgpack
import numpy as np

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
sys.path.insert(0, ROOT)

import streamgroup.core.engine as engine_mod  # noqa: E402
import streamgroup.stream.batch as batch_mod  # noqa: E402
import streamgroup.stream.commit as commit_mod  # noqa: E402
import streamgroup.stream.state as state_mod  # noqa: E402
from streamgroup.core.types import EngineConfig  # noqa: E402
from streamgroup.keys import GROUP, Keys  # noqa: E402
from streamgroup.sim.crowd import Crowd  # noqa: E402
from streamgroup.stream.worker import keep_memory, tune_gc  # noqa: E402

PHASES = collections.Counter[str]()


def _timed(owner: Any, name: str) -> None:
    fn: Callable[..., Any] = getattr(owner, name)

    def wrapper(*args: Any, **kw: Any) -> Any:
        t = time.perf_counter()
        try:
            return fn(*args, **kw)
        finally:
            PHASES[name] += time.perf_counter() - t

    setattr(owner, name, wrapper)


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    p.add_argument("--items", type=int, default=100_000)
    p.add_argument("--batch", type=int, default=500, help="answer entries per batch (plain)")
    p.add_argument("--packed", action="store_true",
                   help="packed answers (column packs) and packed questions")
    p.add_argument("--row-packs", action="store_true",
                   help="with --packed: answers and questions as packs of maps instead of "
                        "column packs")
    p.add_argument("--rounds", type=int, default=400, help="measured batches")
    p.add_argument("--max-outstanding", type=int, default=0,
                   help="questions in flight at most (default: 20 batches, at least 10,000); "
                        "bench_stream's drain runs hold half the items in flight")
    p.add_argument("--default-gc", action="store_true",
                   help="keep CPython's garbage collector thresholds (the worker raises them: "
                        "streamgroup.stream.worker.tune_gc)")
    p.add_argument("--return-memory", action="store_true",
                   help="let the allocator give freed memory back to the kernel (the worker "
                        "keeps it: streamgroup.stream.worker.keep_memory)")
    p.add_argument("--json", action="store_true")
    args = p.parse_args(argv)
    if not args.default_gc:
        tune_gc()
    kept = False if args.return_memory else keep_memory()
    for owner, name in ((batch_mod, "decode_answers"), (state_mod.WorkerState,
                        "apply_answer_columns"), (engine_mod.Engine, "plan_columns"),
                        (engine_mod.Engine, "take_update_columns"), (engine_mod.Engine,
                        "_check_answers"), (engine_mod.Engine, "_decide"),
                        (engine_mod.Engine, "_refit"), (state_mod.Batch, "journal_bytes")):
        _timed(owner, name)
    keys = Keys("bench")
    crowd = Crowd(args.items, delta=0.6, sources=[0.6] * 50, seed=1)
    per_batch = 20_000 if args.packed else args.batch
    cfg = EngineConfig(max_outstanding=args.max_outstanding or max(20 * per_batch, 10_000))
    st = state_mod.WorkerState.fresh(cfg, "bench", 100_000)
    seq = iter(range(1, 1 << 62))
    now = 1_000_000
    pending: list[Any] = []
    for lo in range(0, args.items, 500):
        items = [[f"{next(seq)}-0".encode(), [b"key", k.encode()]]
                 for k in crowd.keys[lo:lo + 500]]
        pending += batch_mod.process(st, keys.items, items, keys.answers, [], now).questions.rows()
    totals = {"answers": 0, "process": 0.0, "build": 0.0, "pack": 0.0, "journal": 0}
    sent: collections.Counter[str] = collections.Counter()
    round_ms: list[float] = []

    def one_round() -> None:
        nonlocal pending, now
        qs, pending = pending[:per_batch], pending[per_batch:]
        same, src = crowd.answer_keys([q.a for q in qs], [q.b for q in qs])
        if args.packed:
            entries = []
            for i in range(0, len(qs), 10_000):
                part = qs[i:i + 10_000]
                if args.row_packs:
                    payload: Any = [{"a": q.a, "b": q.b, "same": s, "source": n, "qid": q.qid}
                                    for q, s, n in zip(part, same[i:i + 10_000],
                                                       src[i:i + 10_000], strict=True)]
                else:
                    payload = {"a": [q.a for q in part], "b": [q.b for q in part],
                               "same": same[i:i + 10_000], "source": src[i:i + 10_000],
                               "qid": [q.qid for q in part]}
                entries.append([f"{next(seq)}-0".encode(),
                                [b"pack", msgpack.packb(payload, use_bin_type=True)]])
        else:
            entries = [[f"{next(seq)}-0".encode(),
                        [b"a", q.a.encode(), b"b", q.b.encode(), b"same", b"1" if s else b"0",
                         b"source", n.encode(), b"qid", q.qid.encode()]]
                       for q, s, n in zip(qs, same, src, strict=True)]
        now += 50
        t0 = time.perf_counter()
        out = batch_mod.process(st, keys.items, [], keys.answers, entries, now)
        t1 = time.perf_counter()
        journal = out.batch.journal_bytes()
        plan = commit_mod.build_commit(
            keys, commit_mod.Caps(), records=out.records, decisions=out.decisions,
            questions=out.questions, dead=[], journal=journal,
            snapshot=None, meta=st.meta_fields(), acks={keys.answers: [e[0] for e in entries]},
            group=GROUP, pack_questions=args.packed,
            question_columns=args.packed and not args.row_packs)
        t2 = time.perf_counter()
        plan.packed()
        t3 = time.perf_counter()
        for c in plan.commands:  # what the transaction sends, by command (after the clock)
            name = c.name if isinstance(c, commit_mod.Prepacked) else str(c[0])
            sent[name] += len(c.blob) if isinstance(c, commit_mod.Prepacked) else len(
                hiredis.pack_command(c))
        totals["answers"] += len(qs)
        totals["process"] += t1 - t0
        totals["build"] += t2 - t1
        totals["pack"] += t3 - t2
        totals["journal"] += len(journal)
        round_ms.append((t3 - t0) * 1e3)
        pending += out.questions.rows()

    warm = max(20, args.rounds // 2) if not args.packed else 20
    for _ in range(warm):
        one_round()
    PHASES.clear()
    totals.update(answers=0, process=0.0, build=0.0, pack=0.0, journal=0)
    round_ms.clear()
    sent.clear()
    for _ in range(args.rounds if not args.packed else max(10, args.rounds // 20)):
        one_round()
    n = max(1, totals["answers"])
    result = {
        "mode": ("packed (maps)" if args.row_packs else "packed (columns)") if args.packed
        else "plain",
        "memory_kept": kept,
        "answers": totals["answers"],
        "us_per_answer": round((totals["process"] + totals["build"] + totals["pack"]) / n * 1e6,
                               2),
        "process_us": round(totals["process"] / n * 1e6, 2),
        "build_commit_us": round(totals["build"] / n * 1e6, 2),
        "pack_command_us": round(totals["pack"] / n * 1e6, 2),
        "journal_bytes_per_answer": round(totals["journal"] / n, 2),
        # the bytes a batch's transaction sends to Redis, per answer, by command
        "commit_bytes_per_answer": {k: round(v / n, 1) for k, v in sent.most_common()},
        # a batch's whole in-process time: the median is the steady cost, the mean adds
        # the rare whole-state passes (refits, recounts after a flip)
        "batch_ms": {"p50": round(float(np.percentile(round_ms, 50)), 3),
                     "p99": round(float(np.percentile(round_ms, 99)), 3),
                     "mean": round(float(np.mean(round_ms)), 3)},
        "phases_us": {k: round(v / n * 1e6, 2) for k, v in PHASES.most_common()},
        "items": st.engine.stats()["items"],
    }
    print(json.dumps(result, indent=2) if args.json else result)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
