"""Refits as the ledger grows: time, page faults and kernel time per refit.

The engine refits between batches whenever its counted answers have grown by
``REFIT_GROWTH`` (35%) since the last fit. Each refit here is that one: ``noise.fit``
(one warm EM round, ``current=True``) after the ledger has grown by 35%, from
``--start`` answers between ``--items`` placed items, with the worker's allocator
settings (``keep_memory``: freed memory stays in the process). A refit whose temporaries
grow with the ledger touches new memory each time (page faults, and kernel time to
supply the pages: costly on a virtual machine); one that takes the answers slice by
slice reuses the memory of the last.

``--against DIR`` runs the same measurement with the code of another checkout (a git
worktree) as well, alternated with this one, each in a fresh process:

    python scripts/bench_refit_growth.py --json
    python scripts/bench_refit_growth.py --against /tmp/base --repeats 3 --json
"""

from __future__ import annotations

import argparse
import json
import os
import re
import resource
import statistics
import subprocess
import sys
import time
from typing import Any

import numpy as np

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


def thp_faults() -> int:
    """Transparent huge pages the kernel has supplied on faults so far (whole machine)."""
    try:
        with open("/proc/vmstat") as fh:
            got = re.search(r"^thp_fault_alloc (\d+)", fh.read(), re.M)
    except OSError:
        return 0
    return int(got.group(1)) if got else 0


def placed_ledger(ledger_cls: Any, items: int, rng: np.random.Generator
                  ) -> tuple[Any, np.ndarray]:
    """A ledger of ``items`` items, every one placed (side 0 or 1, evidence 5 for it), and
    their sides."""
    led = ledger_cls()
    led.add_items(items)
    side = rng.integers(0, 2, items)
    led.items["side"][:items] = side
    led.items["llr"][:items] = (2 * side - 1) * 5.0
    return led, side


def add_answers(led: Any, side: np.ndarray, rng: np.random.Generator, count: int,
                sources: int) -> None:
    """``count`` answers between random items from ``sources`` sources, each right 80% of
    the time, appended in batches of 20,000."""
    items = len(side)
    a = rng.integers(0, items, count)
    b = (a + rng.integers(1, items, count)) % items
    truth = side[a] == side[b]
    same = np.where(rng.random(count) < 0.8, truth, ~truth)
    src = rng.integers(0, sources, count)
    for lo in range(0, count, 20_000):
        part = slice(lo, lo + 20_000)
        led.append_answers(a[part], b[part], src[part], same[part])


def measure(items: int, start: int, refits: int, sources: int, seed: int) -> dict[str, float]:
    """In this process, with the code on sys.path: grow, refit, repeat."""
    from streamgroup.core import ledger as ledger_mod
    from streamgroup.core import noise
    from streamgroup.core.codes import REFIT_GROWTH
    from streamgroup.stream.worker import keep_memory

    keep_memory()
    rng = np.random.default_rng(seed)
    led, side = placed_ledger(ledger_mod.Ledger, items, rng)
    delta, se = np.full(sources, 0.6), np.full(sources, 0.05)

    def grow(count: int) -> None:
        add_answers(led, side, rng, count, sources)

    grow(start)
    led.recompute(delta, se)
    fit = noise.fit(led, delta, se, iterations=1, current=True)  # warm: not measured
    secs = faults = sys_s = 0.0
    thp = 0
    for _ in range(refits):
        grow(int(led.n_answers * REFIT_GROWTH))
        r0, h0, t0 = resource.getrusage(resource.RUSAGE_SELF), thp_faults(), time.perf_counter()
        fit = noise.fit(led, fit.delta, fit.se, iterations=1, current=True)
        t1, h1, r1 = time.perf_counter(), thp_faults(), resource.getrusage(resource.RUSAGE_SELF)
        secs += t1 - t0
        faults += r1.ru_minflt - r0.ru_minflt
        sys_s += r1.ru_stime - r0.ru_stime
        thp += h1 - h0
    return {"answers_at_end": led.n_answers, "refit_s": secs / refits,
            "faults_per_refit": faults / refits, "huge_page_faults_per_refit": thp / refits,
            "sys_s_per_refit": sys_s / refits}


def run_child(root: str, args: argparse.Namespace) -> dict[str, float]:
    env = {**os.environ, "PYTHONPATH": root}
    out = subprocess.run(
        [sys.executable, os.path.abspath(__file__), "--child", "--items", str(args.items),
         "--start", str(args.start), "--refits", str(args.refits), "--sources",
         str(args.sources)], env=env, check=True, capture_output=True, cwd=root)
    return json.loads(out.stdout)


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    p.add_argument("--items", type=int, default=300_000)
    p.add_argument("--start", type=int, default=600_000, help="answers before the first refit")
    p.add_argument("--refits", type=int, default=5, help="refits measured, 35%% apart")
    p.add_argument("--sources", type=int, default=50)
    p.add_argument("--repeats", type=int, default=2, help="fresh processes per checkout")
    p.add_argument("--against", help="another checkout to measure alternately with this one")
    p.add_argument("--json", action="store_true")
    p.add_argument("--child", action="store_true", help=argparse.SUPPRESS)
    args = p.parse_args(argv)
    if args.child:
        print(json.dumps(measure(args.items, args.start, args.refits, args.sources, 1)))
        return 0
    roots = {"this": ROOT, **({"against": os.path.abspath(args.against)} if args.against
                              else {})}
    runs: dict[str, list[dict[str, float]]] = {name: [] for name in roots}
    for _ in range(args.repeats):
        for name, root in roots.items():
            runs[name].append(run_child(root, args))
    result: dict[str, object] = {"items": args.items, "start": args.start,
                                 "refits": args.refits}
    for name, got in runs.items():
        result[name] = {
            "answers_at_end": got[0]["answers_at_end"],
            **{k: round(statistics.median(r[k] for r in got), 4)
               for k in ("refit_s", "faults_per_refit", "huge_page_faults_per_refit",
                         "sys_s_per_refit")},
            "refit_s_runs": [round(r["refit_s"], 4) for r in got],
        }
    print(json.dumps(result, indent=None if args.json else 2))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
