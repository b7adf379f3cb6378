"""The (pair, source) set: time per key offered, with and without the bit filter.

Side by side in one run: ``PairSet`` as the engine uses it, and the same two sorted runs
searched for every key (the design before the filter, kept here as the reference).
Batches of 200 keys are the plain worker's (its default batch), 20,000 the packed
worker's (``--batches`` sets others); the set starts with ``--members`` random keys, and
about one key in a hundred offered is a repeat.

    python scripts/bench_pairset.py --json
    python scripts/bench_pairset.py --members 1000000 --batches 200 --json
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

from streamgroup.core.columns import insert_sorted  # noqa: E402
from streamgroup.core.pairset import PairSet  # noqa: E402


class SearchAll(PairSet):
    """The set without its filter: every key is searched for in both runs."""

    def add_new(self, keys: np.ndarray) -> np.ndarray:
        keys = np.asarray(keys, dtype=np.uint64)
        count = len(keys)
        order = keys.argsort(kind="stable")
        ordered = keys[order]
        fresh_mask = np.empty(count, dtype=bool)
        fresh_mask[0] = True
        np.not_equal(ordered[1:], ordered[:-1], out=fresh_mask[1:])
        if len(self.sorted):
            fresh_mask &= ~self._member(self.sorted, ordered)
        at = self.recent.searchsorted(ordered)
        if len(self.recent):
            fresh_mask &= ~(self.recent.take(at, mode="clip") == ordered)
        new = np.empty(count, dtype=bool)
        new[order] = fresh_mask
        if np.count_nonzero(fresh_mask):
            self.recent = insert_sorted(self.recent, at[fresh_mask], ordered[fresh_mask])
            if len(self.recent) > max(8192, int((len(self.sorted) * 2000) ** 0.5)):
                self.merge()
        return new


def offered(rng: np.random.Generator, members: np.ndarray, batch: int, rounds: int
            ) -> list[np.ndarray]:
    """Batches of random keys, one in a hundred a member already (a repeat)."""
    out = []
    for _ in range(rounds):
        keys = rng.integers(0, 1 << 62, batch, dtype=np.int64).astype(np.uint64)
        again = rng.random(batch) < 0.01
        keys[again] = rng.choice(members, int(again.sum()))
        out.append(keys)
    return out


def run(cls: type[PairSet], members: np.ndarray, batches: list[np.ndarray]
        ) -> tuple[float, list[np.ndarray]]:
    pairs = cls.from_bytes(np.sort(members).tobytes())
    t0 = time.perf_counter()
    got = [pairs.add_new(b) for b in batches]
    return time.perf_counter() - t0, got


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    p.add_argument("--members", type=int, default=2_000_000, help="keys in the set at first")
    p.add_argument("--keys", type=int, default=3_000_000, help="keys offered per run")
    p.add_argument("--repeats", type=int, default=3, help="alternated runs of each")
    p.add_argument("--batches", default="200,20000",
                   help="keys per batch, comma-separated (default: 200,20000)")
    p.add_argument("--json", action="store_true")
    args = p.parse_args(argv)
    rng = np.random.default_rng(1)
    members = np.unique(rng.integers(0, 1 << 62, args.members, dtype=np.int64)
                        ).astype(np.uint64)
    report: dict[str, object] = {"members": len(members), "keys": args.keys}
    try:
        sizes = [int(x) for x in args.batches.split(",")]
    except ValueError:
        p.error(f"--batches: comma-separated whole numbers, not {args.batches!r}")
    if any(size < 1 for size in sizes):
        p.error("--batches: every batch needs at least one key")
    for batch in sizes:
        batches = offered(rng, members, batch, max(1, args.keys // batch))
        times: dict[str, list[float]] = {"filtered": [], "search_all": []}
        for _ in range(args.repeats):
            t_new, got_new = run(PairSet, members, batches)
            t_old, got_old = run(SearchAll, members, batches)
            if any((x != y).any() for x, y in zip(got_new, got_old, strict=True)):
                raise SystemExit("bench_pairset: the two sets disagree")
            times["filtered"].append(t_new)
            times["search_all"].append(t_old)
        keys = sum(len(b) for b in batches)
        best = {k: min(v) / keys * 1e9 for k, v in times.items()}
        report[f"batch_{batch}"] = {
            "ns_per_key_filtered": round(best["filtered"], 1),
            "ns_per_key_search_all": round(best["search_all"], 1),
            "speedup": round(best["search_all"] / best["filtered"], 2),
        }
    print(json.dumps(report, indent=None if args.json else 2))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
