"""The sources of a column pack: read as byte rows and looked up, against a str each.

Side by side in one run: a pack's ``source`` column of ``--answers`` names (drawn from
``--sources`` names of one length) taken as the key-row path takes it today (numpy reads
the rows, ``NameRows`` finds their ids) and as it took it before (msgpack makes a str per
answer, ``_short_texts`` checks them, a dict gives the ids). Both must give the same ids.

    python scripts/bench_sources.py --json
"""

from __future__ import annotations

import argparse
import functools
import json
import os
import sys
import timeit

import msgpack
import numpy as np

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
sys.path.insert(0, ROOT)

from streamgroup.core.sourcenames import NameRows  # noqa: E402
from streamgroup.stream.codec import _short_texts, _str_rows  # noqa: E402


def as_str(blob: bytes, index: dict[str, int]) -> np.ndarray:
    """A str per answer, checked, then each one's id from a dict (the path before)."""
    got = msgpack.unpackb(blob, raw=False)
    if not _short_texts(got):
        raise SystemExit("bench_sources: the names failed the check")
    return np.fromiter(map(index.__getitem__, got), dtype=np.int64, count=len(got))


def as_rows(blob: bytes, names: list[str], lookup: NameRows) -> np.ndarray:
    """Byte rows read by numpy, their ids from ``NameRows`` (the key-row path today)."""
    got = _str_rows(blob, 0, len(blob))
    if got is None:
        raise SystemExit("bench_sources: the names are not of one length")
    ids = lookup.ids(np.ascontiguousarray(got[0][:, got[1]:]), names)
    if ids is None:
        raise SystemExit("bench_sources: a name was not found")
    return ids


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    p.add_argument("--answers", type=int, default=10_000)
    p.add_argument("--repeats", type=int, default=7)
    p.add_argument("--json", action="store_true")
    args = p.parse_args(argv)
    rng = np.random.default_rng(1)
    report: dict[str, object] = {"answers": args.answers}
    for count in (200, 5_000):
        names = [f"src-{i:04d}" for i in range(count)]
        blob = msgpack.packb([names[i] for i in rng.integers(0, count, args.answers)])
        paths = {"rows": functools.partial(as_rows, blob, names, NameRows()),
                 "str": functools.partial(as_str, blob, {x: k for k, x in enumerate(names)})}
        if not np.array_equal(paths["str"](), paths["rows"]()):
            raise SystemExit("bench_sources: the two paths disagree")
        best = {name: min(timeit.repeat(f, number=20, repeat=args.repeats)) / 20
                / args.answers * 1e9 for name, f in paths.items()}
        report[f"sources_{count}"] = {"ns_per_answer_rows": round(best["rows"], 1),
                                      "ns_per_answer_str": round(best["str"], 1),
                                      "speedup": round(best["str"] / best["rows"], 2)}
    print(json.dumps(report, indent=None if args.json else 2))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
