"""Every fault and bad-input scenario, against private redis-server processes started here.

    python scripts/fault_matrix.py --json        # a JSON list of {fault, outcome, passed, details}
    python scripts/fault_matrix.py --markdown    # the table of the README section
    python scripts/fault_matrix.py --only redis_maxmemory,bad_input --json

The scenarios are the ones the tests run (tests/faultkit.py, tests/badcorpus.py,
tests/floodkit.py): each starts its own redis-server on a free loopback port (never 6379),
runs ``streamgroup run`` as a separate process over a recorded input, injects the fault,
and compares the end state with an uninterrupted run over the same input. Each malformed
entry kind of the corpus gets its own row. Exit code 0 when every row passed, else 1.
Takes about a minute on a 2-core machine (one scenario blocks Redis for 11 s on purpose).
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import time
from collections.abc import Callable
from typing import Any

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
sys.path.insert(0, ROOT)

from tests import badcorpus, faultkit, floodkit  # noqa: E402 - needs the path above


def _flood_plain() -> faultkit.Result:
    return floodkit.flood(200_000, n_items=2_000, per_entry=1)


SCENARIOS: dict[str, Callable[[], faultkit.Result]] = {
    "sigkill_startup": faultkit.sigkill_startup,
    "redis_restart_aof": faultkit.redis_restart_aof,
    "redis_power_cut_aof": faultkit.redis_power_cut_aof,
    "redis_power_cut_aof_checked": faultkit.redis_power_cut_aof_checked,
    "redis_data_lost": faultkit.redis_data_lost,
    "namespace_flushed": faultkit.namespace_flushed,
    "client_kill": faultkit.client_kill,
    "second_worker": faultkit.second_worker,
    "redis_paused": faultkit.redis_paused,
    "redis_paused_past_timeout": faultkit.redis_paused_past_timeout,
    "redis_maxmemory": faultkit.redis_maxmemory,
    "bad_input": badcorpus.bad_input,
    "flood_packed": floodkit.flood,
    "flood_plain": _flood_plain,
}


def run(names: list[str]) -> list[dict[str, Any]]:
    rows: list[dict[str, Any]] = []
    for name in names:
        t0 = time.monotonic()
        try:
            res = SCENARIOS[name]()
        except Exception as exc:  # noqa: BLE001 - a broken scenario is a failed row, not a crash
            res = faultkit.Result(name, f"scenario error: {type(exc).__name__}: {exc}", False)
        row = res.as_dict()
        row["details"]["scenario"] = name
        row["details"]["seconds"] = round(time.monotonic() - t0, 1)
        per_kind = row["details"].pop("rows", None)
        rows.append(row)
        for k in per_kind or ():  # one row per malformed-entry kind
            rows.append({"fault": f"bad input: {k['kind']}",
                         "outcome": f"dead letter: {k['reason']}" if k["reason"]
                         else "NOT dead-lettered", "passed": bool(k["ok"]),
                         "details": {"scenario": name}})
        print(f"{name}: {'passed' if res.passed else 'FAILED'} in "
              f"{row['details']['seconds']} s", file=sys.stderr, flush=True)
    return rows


def markdown(rows: list[dict[str, Any]]) -> str:
    def cell(text: str) -> str:
        return text.replace("|", "\\|").replace("\n", " ")

    out = ["| fault or bad input | outcome | passed |", "|---|---|---|"]
    for r in rows:
        out.append(f"| {cell(r['fault'])} | {cell(r['outcome'])} | "
                   f"{'yes' if r['passed'] else '**no**'} |")
    return "\n".join(out)


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    p.add_argument("--json", action="store_true", help="print the rows as a JSON list")
    p.add_argument("--markdown", action="store_true", help="print the README table")
    p.add_argument("--only", default="", help="comma-separated scenario names: "
                   + ", ".join(SCENARIOS))
    args = p.parse_args(argv)
    names = [n for n in args.only.split(",") if n] or list(SCENARIOS)
    unknown = [n for n in names if n not in SCENARIOS]
    if unknown:
        p.error(f"unknown scenario {', '.join(unknown)}; known: {', '.join(SCENARIOS)}")
    from streamgroup.logs import configure_logging

    configure_logging("warning", "json", sys.stderr)  # stdout carries only the result
    rows = run(names)
    if args.json:
        print(json.dumps(rows, indent=1, default=str))
    if args.markdown or not args.json:
        print(markdown(rows))
    return 0 if all(r["passed"] for r in rows) else 1


if __name__ == "__main__":
    raise SystemExit(main())
