"""A source refit over a large ledger: pairs weighed in chunks against one pass.

Side by side in one run, alternated: ``noise.fit`` (one warm EM round) over ``--answers``
answers between ``--items`` placed items, with the recount's pairs (and the M-step's
answers) taken in chunks of ``WEIGH_CHUNK`` and in a single pass. Both must give the same
evidence bit for bit; the script checks it. ``fit_s_current`` is the refit as the engine
runs it between batches: chunked, with the evidence already current (``current=True``:
no recount before the M-step).

    python scripts/bench_refit.py --json
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import time

import numpy as np

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
sys.path.insert(0, ROOT)

from bench_refit_growth import add_answers, placed_ledger  # noqa: E402  (same folder)

from streamgroup.core import ledger as ledger_mod  # noqa: E402
from streamgroup.core import noise  # noqa: E402


def build(items: int, answers: int, sources: int, seed: int) -> ledger_mod.Ledger:
    """Every item placed, answers from sources right 80% of the time."""
    rng = np.random.default_rng(seed)
    led, side = placed_ledger(ledger_mod.Ledger, items, rng)
    add_answers(led, side, rng, answers, sources)
    led.recompute(np.full(sources, 0.6), np.full(sources, 0.05))
    return led


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    p.add_argument("--items", type=int, default=300_000)
    p.add_argument("--answers", type=int, default=2_000_000)
    p.add_argument("--sources", type=int, default=50)
    p.add_argument("--repeats", type=int, default=5)
    p.add_argument("--json", action="store_true")
    args = p.parse_args(argv)
    chunk = ledger_mod.WEIGH_CHUNK
    led = build(args.items, args.answers, args.sources, 1)
    delta, se = np.full(args.sources, 0.6), np.full(args.sources, 0.05)
    times: dict[str, list[float]] = {"chunked": [], "one_pass": [], "current": []}
    results: dict[str, bytes] = {}
    start = {name: led.item(name).copy() for name in ("llr", "s1", "s2", "count")}
    for _ in range(args.repeats):
        for name, size in (("chunked", chunk), ("one_pass", 1 << 62), ("current", chunk)):
            for col, values in start.items():  # each fit from the same evidence
                led.item(col)[:] = values
            ledger_mod.WEIGH_CHUNK = noise.WEIGH_CHUNK = size
            t0 = time.perf_counter()
            noise.fit(led, delta, se, iterations=1, current=name == "current")
            times[name].append(time.perf_counter() - t0)
            if name != "current":
                results[name] = led.item("llr").tobytes() + led.item("s2").tobytes()
    ledger_mod.WEIGH_CHUNK = noise.WEIGH_CHUNK = chunk
    if results["chunked"] != results["one_pass"]:
        raise SystemExit("bench_refit: the chunked recount differs from one pass")
    best = {k: min(v) for k, v in times.items()}
    print(json.dumps({
        "items": args.items, "answers": args.answers, "weigh_chunk": chunk,
        "fit_s_chunked": round(best["chunked"], 4),
        "fit_s_one_pass": round(best["one_pass"], 4),
        "speedup": round(best["one_pass"] / best["chunked"], 2),
        "fit_s_current": round(best["current"], 4),
        "same_bits": True,
    }, indent=None if args.json else 2))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
