"""The README's spend table: the target runs of bench_spend.py, each as its own process.

    python scripts/bench_table.py                 # n=100000, alpha=1e-3, seed 1
    python scripts/bench_table.py --n 2000 --json-out bench.json
    python scripts/bench_table.py --seed 1 --seed 2 --seed 3   # one block of rows per seed

Prints a markdown table (one row per run, then the targets checked) and, with
``--json-out``, writes every run's JSON object to that file.
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import time
from pathlib import Path
from typing import Any

HERE = Path(__file__).resolve().parent

# (label, extra flags) of the target configurations.
RUNS: list[tuple[str, list[str]]] = [
    ("delta 0.3, W=1", ["--delta", "0.3", "--inflight", "1"]),
    ("delta 0.6, W=1", ["--delta", "0.6", "--inflight", "1"]),
    ("delta 0.6, W=8", ["--delta", "0.6", "--inflight", "8"]),
    ("mixed, W=1", ["--mixed", "--inflight", "1"]),
]


def run_one(flags: list[str], common: list[str]) -> dict[str, Any]:
    cmd = [sys.executable, str(HERE / "bench_spend.py"), *common, *flags, "--json"]
    done = subprocess.run(cmd, capture_output=True, text=True, check=False)
    if done.returncode != 0:
        raise SystemExit(f"bench_spend failed ({' '.join(cmd)}):\n{done.stderr.strip()}")
    res = json.loads(done.stdout)
    res["command"] = "python scripts/bench_spend.py " + " ".join([*common, *flags, "--json"])
    return res


def checks(rows: dict[str, dict[str, Any]], alpha: float) -> list[tuple[str, str, bool]]:
    """(target, measured, met) for each target of the design brief."""
    out: list[tuple[str, str, bool]] = []
    for label, r in rows.items():
        if r["mixed"]:
            out.append((f"{label}: spend <= 1.10 x limit", f"{r['ratio_to_limit']:.4f}",
                        r["ratio_to_limit"] <= 1.10))
        else:
            if r["inflight"] == 1:
                out.append((f"{label}: spend <= 1.05 x limit", f"{r['ratio_to_limit']:.4f}",
                            r["ratio_to_limit"] <= 1.05))
                out.append((f"{label}: spend <= 0.45 x two-phase",
                            f"{r['ratio_to_fixed']:.4f}", r["ratio_to_fixed"] <= 0.45))
        out.append((f"{label}: bootstrap <= 2% of spend",
                    f"{100 * r['bootstrap_share']:.2f}%", r["bootstrap_share"] <= 0.02))
        out.append((f"{label}: error CI95 low <= alpha", f"{r['error_ci95'][0]:.2e}",
                    r["error_ci95"][0] <= alpha))
    for label, w8 in rows.items():
        if "W=8" not in label:
            continue
        w1 = rows.get(label.replace("W=8", "W=1"))
        if w1 is None:
            continue
        extra = w8["questions"] / w1["questions"] - 1
        out.append((f"{label}: spend <= 2% above W=1 (same seed)", f"{100 * extra:+.2f}%",
                    extra <= 0.02))
    return out


def table(rows: dict[str, dict[str, Any]], alpha: float) -> str:
    head = ("| run | spend | limit | / limit | two-phase | / two-phase | bootstrap (ours) "
            "| bootstrap (A x B) | errors / placed | error 95% CI | unresolved | rounds | s |")
    lines = [head, "|" + "---|" * (head.count("|") - 1)]
    for label, r in rows.items():
        lo, hi = r["error_ci95"]
        lines.append(
            f"| {label} | {r['questions']:,} | {r['per_item_limit']:,.0f} "
            f"| {r['ratio_to_limit']:.3f} | {r['fixed_baseline']:,} | {r['ratio_to_fixed']:.3f} "
            f"| {r['bootstrap_questions']:,} ({100 * r['bootstrap_share']:.2f}%) "
            f"| {r['fixed_bootstrap_questions']:,} "
            f"| {r['errors']} / {r['placed']:,} | [{lo:.1e}, {hi:.1e}] "
            f"| {r['unresolved']} | {r['rounds']:,} | {r['seconds']:.0f} |"
        )
    lines += ["", "| target | measured | met |", "|---|---|---|"]
    lines += [f"| {t} | {m} | {'yes' if ok else '**no**'} |" for t, m, ok in checks(rows, alpha)]
    return "\n".join(lines)


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    p.add_argument("--n", type=int, default=100_000)
    p.add_argument("--alpha", type=float, default=1e-3)
    p.add_argument("--seed", type=int, action="append", default=None,
                   help="crowd and engine seed (repeatable; default 1)")
    p.add_argument("--only", action="append", default=None,
                   help="run only the rows whose label contains this text (repeatable)")
    p.add_argument("--json-out", type=Path, default=None, help="write all runs here")
    a = p.parse_args(argv)
    seeds = a.seed or [1]
    rows: dict[str, dict[str, Any]] = {}
    for seed in seeds:
        common = ["--n", str(a.n), "--alpha", repr(a.alpha), "--seed", str(seed)]
        for label, flags in RUNS:
            if a.only and not any(o in label for o in a.only):
                continue
            name = label if len(seeds) == 1 else f"{label}, seed {seed}"
            t = time.perf_counter()
            rows[name] = run_one(flags, common)
            print(f"# {name}: {time.perf_counter() - t:.0f} s", file=sys.stderr, flush=True)
    if a.n != 100_000:
        print(f"(n = {a.n:,}: the design's targets are stated for n = 100,000)\n")
    print(table(rows, a.alpha))
    blob = json.dumps({"n": a.n, "alpha": a.alpha, "seeds": seeds, "runs": rows}, indent=2)
    if a.json_out:
        a.json_out.write_text(blob + "\n")
    else:
        print()
        print(blob)
    return 0


if __name__ == "__main__":
    sys.exit(main())
