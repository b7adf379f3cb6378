"""How steadily this machine runs a busy process: the pauses it takes when its cores are busy.

    python scripts/bench_machine.py --json

Each probe is a process that reads the monotonic clock in a tight loop for ``--seconds``
and records every gap between two reads longer than half a millisecond: time in which the
process did not run (the kernel ran something else, or the hypervisor ran another guest).
One probe runs alone first (one core busy, the rest idle), then one probe per core at once
(every core busy, as the stream worker and Redis keep them at full speed).

A lookup that lands in such a pause waits for it, whatever Redis and the worker do: on a
machine where every-core-busy probes see pauses of several milliseconds, a lookup p99 of
a few milliseconds under full load is the machine's, not the worker's
(``bench_stream.py`` reports the same floor as ``lookup_busy_floor_p99_ms``).

Then the cost of memory the process had given back: ``--touch-mib`` MiB are allocated and
written, freed, and written again at once (the kernel hands back the same pages), then
again after ``--idle`` seconds. A virtual machine whose balloon reports free pages to its
host (free page reporting) gives them to the host in between, and writing them again
costs many times more (``touch_ms_per_mib``): that is why the worker keeps what it frees
(``keep_memory``, README "Operations").
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import time
from typing import Any

THRESHOLDS_MS = (0.5, 1.0, 2.0, 5.0)


def probe(seconds: float) -> dict[str, Any]:
    """Spin on the clock; the gaps longer than the smallest threshold."""
    clock = time.perf_counter
    floor = THRESHOLDS_MS[0] / 1000
    gaps: list[float] = []
    last = start = clock()
    end = start + seconds
    while last < end:
        now = clock()
        if now - last > floor:
            gaps.append(now - last)
        last = now
    return summary(gaps, last - start)


def summary(gaps: list[float], seconds: float) -> dict[str, Any]:
    out: dict[str, Any] = {f"gaps_over_{t}_ms": sum(g * 1000 > t for g in gaps)
                           for t in THRESHOLDS_MS}
    out["paused_share"] = round(sum(gaps) / seconds, 4)
    out["longest_ms"] = round(max(gaps, default=0.0) * 1000, 2)
    return out


def run_probes(n: int, seconds: float) -> list[dict[str, Any]]:
    """``n`` probes at once, each in its own process."""
    procs = [subprocess.Popen([sys.executable, os.path.abspath(__file__), "--probe",
                               str(seconds)], stdout=subprocess.PIPE) for _ in range(n)]
    return [json.loads(p.communicate(timeout=seconds + 60)[0]) for p in procs]


def touch_costs(mib: int, idle: float) -> dict[str, float]:
    """Milliseconds per MiB to write fresh memory: first, again at once, again after idle.

    Each write is a new numpy array (an anonymous mapping of its own, returned to the
    kernel when freed), so every page is faulted in each time."""
    import numpy as np

    def touch() -> float:
        t0 = time.perf_counter()
        a = np.ones(mib << 17)  # 8-byte floats: 131,072 to the MiB
        spent = time.perf_counter() - t0
        del a
        return round(spent * 1000 / mib, 3)

    first, again = touch(), touch()
    time.sleep(idle)
    return {"first": first, "again_at_once": again, f"again_after_{idle:g}s": touch()}


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    p.add_argument("--seconds", type=float, default=5.0, help="length of each probe")
    p.add_argument("--touch-mib", type=int, default=256, help="memory written per touch")
    p.add_argument("--idle", type=float, default=5.0,
                   help="seconds before the memory is written once more")
    p.add_argument("--json", action="store_true")
    p.add_argument("--probe", type=float, help=argparse.SUPPRESS)
    args = p.parse_args(argv)
    if args.probe is not None:
        print(json.dumps(probe(args.probe)))
        return 0
    cores = os.cpu_count() or 1
    result = {
        "cores": cores,
        "seconds": args.seconds,
        "one_core_busy": run_probes(1, args.seconds)[0],
        "every_core_busy": run_probes(cores, args.seconds),
        "touch_ms_per_mib": touch_costs(args.touch_mib, args.idle),
    }
    print(json.dumps(result, indent=2) if args.json else result)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
