"""Whole-state passes of the engine: a snapshot (time, size, zstd against zlib) and a recount.

    python scripts/bench_snapshot.py --json                      # 300,000 items, 600,000 answers
    python scripts/bench_snapshot.py --items 100000 --answers 200000 --json

The worker writes a snapshot every ``snapshot_every`` seconds (or when the journal has grown
past its bound) inside a batch transaction and processes nothing while it builds one, so
``snapshot_s`` is a pause in ingestion: ``capture_s`` copies the arrays, ``pieces_s`` walks
them into msgpack pieces, and zstd compresses the pieces as they are (no joined copy). The engine is
driven by the simulated crowd (one source pool, delta 0.6) until it has counted
``--answers`` answers; then the snapshot is built and restored, and the same msgpack is
compressed by zstd at level 1 (the format written now) and zlib at level 1 (the format
written before) in the same run. ``recount_s`` is one full recount of the evidence
(``Ledger.recompute``), the bulk of a refit of the sources' biases: the worker makes
about four such passes over all answers for every 35% that the answers grow.
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import time
import zlib
from collections.abc import Callable

import zstandard

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
sys.path.insert(0, ROOT)

from streamgroup.core.engine import Engine  # noqa: E402
from streamgroup.core.packing import msgpack_pieces  # noqa: E402
from streamgroup.core.snapshot import SNAPSHOT_MAGIC, capture  # noqa: E402
from streamgroup.core.types import AnswerColumns, EngineConfig  # noqa: E402
from streamgroup.sim.crowd import Crowd  # noqa: E402


def build(items: int, answers: int) -> Engine:
    crowd = Crowd(items, delta=0.6, sources=[0.6] * 50, seed=1)
    eng = Engine(EngineConfig(max_outstanding=max(items // 2, 1000)))
    for lo in range(0, items, 50_000):
        eng.add_items([(k, None) for k in crowd.keys[lo:lo + 50_000]])
    now, idle = 1, 0
    while eng.spend < answers and idle < 50:
        qs = eng.plan_columns(now)
        if not len(qs.qid):  # the bootstrap block waits for its answers: let time pass
            now, idle = now + 1000, idle + 1
            continue
        same, src = crowd.answer_keys(qs.a, qs.b)
        eng.add_answer_columns(AnswerColumns(qs.a, qs.b, list(same), list(src), qs.qid), now)
        now += 10
    return eng


def best_of(fn: Callable[[], object], repeat: int) -> float:
    """The shortest of ``repeat`` timed calls (the least disturbed by the machine)."""
    times = []
    for _ in range(repeat):
        t = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t)
    return min(times)


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    p.add_argument("--items", type=int, default=300_000)
    p.add_argument("--answers", type=int, default=600_000)
    p.add_argument("--repeat", type=int, default=3, help="timings are the best of this many")
    p.add_argument("--json", action="store_true")
    args = p.parse_args(argv)
    eng = build(args.items, args.answers)
    snap = eng.snapshot()
    state = capture(eng)
    assert snap[:4] == SNAPSHOT_MAGIC
    raw = zstandard.ZstdDecompressor().decompress(snap[4:])
    out = {
        "items": len(eng.keys),
        "answers": eng.spend,
        "msgpack_bytes": len(raw),
        "snapshot_s": round(best_of(eng.snapshot, args.repeat), 3),
        "snapshot_bytes": len(snap),
        "capture_s": round(best_of(lambda: capture(eng), args.repeat), 4),
        "pieces_s": round(best_of(lambda: msgpack_pieces(state), args.repeat), 4),
        "restore_s": round(best_of(lambda: Engine.restore(snap), args.repeat), 3),
        "recount_s": round(best_of(lambda: eng.ledger.recompute(eng.delta, eng.se),
                                   args.repeat), 4),
        "zstd1_compress_s": round(best_of(
            lambda: zstandard.ZstdCompressor(level=1).compress(raw), args.repeat), 3),
        "zstd1_bytes": len(zstandard.ZstdCompressor(level=1).compress(raw)),
        "zlib1_compress_s": round(best_of(lambda: zlib.compress(raw, 1), args.repeat), 3),
        "zlib1_bytes": len(zlib.compress(raw, 1)),
    }
    out["zlib1_over_zstd1_time"] = round(out["zlib1_compress_s"] / out["zstd1_compress_s"], 2)
    print(json.dumps(out, indent=2) if args.json else out)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
