"""Heavier floods than the tests run: a bigger burst of packed answers, or of plain entries.

    python scripts/flood_heavy.py                          # 3,000,000 packed answers
    python scripts/flood_heavy.py --answers 5000000 --items 50000 --json
    python scripts/flood_heavy.py --plain --answers 1000000

Same checks as tests/test_flood.py (tests/floodkit.py): every answer counted once, reads
bounded to three batches, question caps held, lag back to 0, input streams trimmed; prints
the figures (memory growth of the worker and of Redis, rates, drain time). The worker
keeps every counted answer in its ledger (about 200 bytes each), so size --answers to
the machine: 5,000,000 needs about 1.5 GB for the worker and 0.5 GB for the burst.
"""

from __future__ import annotations

import argparse
import json
import os
import sys

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
sys.path.insert(0, ROOT)

from tests import floodkit  # noqa: E402 - needs the path above


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    p.add_argument("--answers", type=int, default=3_000_000)
    p.add_argument("--items", type=int, default=20_000)
    p.add_argument("--plain", action="store_true", help="one answer per entry, not packed")
    p.add_argument("--batch", type=int, default=500)
    p.add_argument("--timeout", type=float, default=1800.0, help="seconds to drain")
    p.add_argument("--json", action="store_true")
    args = p.parse_args(argv)
    from streamgroup.logs import configure_logging

    configure_logging("warning", "json", sys.stderr)
    res = floodkit.flood(args.answers, n_items=args.items, batch=args.batch,
                         per_entry=1 if args.plain else floodkit.MAX_PACK_ANSWERS,
                         timeout=args.timeout)
    if args.json:
        print(json.dumps(res.as_dict(), indent=1, default=str))
    else:
        print(f"{res.fault}: {'passed' if res.passed else 'FAILED'}\n  {res.outcome}")
    return 0 if res.passed else 1


if __name__ == "__main__":
    raise SystemExit(main())
