"""Spend of the placement engine against the simulated crowd, next to its yardsticks.

    python scripts/bench_spend.py --n 100000 --delta 0.6 --alpha 1e-3 --inflight 1 --seed 1 --json

The engine never sees delta: it learns the noise from the answers. Each simulated round the
engine plans its questions, the crowd answers them at once (each by a uniformly random
source), the engine takes the answers, and the clock moves on; until every item is placed
or unresolved (or a safety cap is hit, reported as ``stopped``).

Yardsticks:
- ``per_item_limit``: n * E[N] of the SPRT that knows delta and has a perfect reference
  (gambler's-ruin closed form, Wald 1947); with ``--mixed``, n times the mean length of
  the SPRT that knows every source's delta, by Monte Carlo over 100,000 walks.
- ``fixed_baseline``: the two-phase method (streamgroup.core.baseline): an A x B bootstrap
  sized to give a reference of the engine's size (its bootstrap's reference, or m if that
  is larger, since each item votes against m distinct members) that is all correct with
  probability >= 0.99 (exact closed form, see the module), then per other item the
  smallest odd m whose binomial majority error is <= alpha
  (m from scipy.stats.binom here). With ``--mixed`` the method cannot tell sources apart,
  so it runs on the pooled delta (mean over the crowd's sources; exact, because each answer
  comes from an independent uniformly random source).

Errors: the engine's side labels are matched to the truth by the better of the two
relabellings; unresolved items are not errors (they are reported). The 95% interval of the
error rate is Clopper-Pearson (scipy.stats.beta).
"""

from __future__ import annotations

import argparse
import json
import math
import sys
import time
from typing import Any

import numpy as np
from scipy.stats import beta as beta_dist
from scipy.stats import binom

from streamgroup.core import baseline, sprt
from streamgroup.core.types import EngineConfig
from streamgroup.sim import Crowd, mixed_sources

MIXED_SOURCES = 200
LIMIT_WALKS = 100_000
REFERENCE_CONFIDENCE = 0.99
DEFAULT_REFERENCE = 200  # used only if the engine does not report its reference size


# -- statistics --------------------------------------------------------------------


def clopper_pearson(errors: int, trials: int, level: float = 0.95) -> tuple[float, float]:
    """Exact binomial interval for errors/trials (Clopper & Pearson 1934, via scipy.stats.beta)."""
    if trials <= 0:
        return (0.0, 1.0)
    tail = (1.0 - level) / 2.0
    lo = 0.0 if errors == 0 else float(beta_dist.ppf(tail, errors, trials - errors + 1))
    hi = 1.0 if errors == trials else float(beta_dist.ppf(1 - tail, errors + 1, trials - errors))
    return (lo, hi)


def fixed_votes_scipy(alpha: float, delta: float) -> int:
    """Smallest odd m with P(majority of m answers wrong) <= alpha, by scipy.stats.binom."""
    q = (1.0 - delta) / 2.0
    top = 101
    while True:
        m = np.arange(1, top + 1, 2)
        ok = binom.sf((m - 1) // 2, m, q) <= alpha
        if ok.any():
            return int(m[np.argmax(ok)])
        top = 4 * top + 1


def count_errors(labels: list[str | None], truth: np.ndarray) -> tuple[int, int]:
    """(errors, placed) over items with a side, up to the better relabelling of two sides."""
    placed = np.array([lab is not None for lab in labels], dtype=bool)
    seen = sorted({lab for lab in labels if lab is not None})
    if len(seen) > 2:
        raise ValueError(f"expected at most two side labels, got {seen}")
    code = {lab: i for i, lab in enumerate(seen)}
    got = np.array([code[lab] if lab is not None else -1 for lab in labels], dtype=np.int64)
    t = np.asarray(truth, dtype=np.int64)[placed]
    g = got[placed]
    return int(min(np.sum(g != t), np.sum(g == t))), int(placed.sum())


# -- the simulation ------------------------------------------------------------------


def _stat(stats: dict[str, Any], *path: str) -> Any:
    cur: Any = stats
    for p in path:
        if not isinstance(cur, dict) or p not in cur:
            return None
        cur = cur[p]
    return cur


def bootstrap_spend(stats: dict[str, Any]) -> int:
    """Questions the engine spent on its bootstrap (its 'seed' questions)."""
    for path in (("bootstrap_spend",), ("issued", "seed"), ("spend_by_why", "seed")):
        v = _stat(stats, *path)
        if v is not None:
            return int(v)
    raise KeyError("engine.stats() reports no bootstrap spend ('bootstrap_spend' or issued.seed)")


def reference_size(engine: Any) -> int:
    """Members of the reference the engine's bootstrap produced (before it grew by placing)."""
    base = getattr(engine, "pool_base", None)
    if base:
        return int(base)
    v = _stat(engine.stats(), "reference")
    return int(v) if v is not None else DEFAULT_REFERENCE


def reference_correct(engine: Any, crowd: Crowd) -> bool | None:
    """Whether the bootstrap's reference members all sit on their true sides (None: unknown)."""
    pool, base = getattr(engine, "pool", None), getattr(engine, "pool_base", None)
    if pool is None or not base:
        return None
    members = [engine.keys[i] for i in np.asarray(pool)[:base].tolist()]
    labels = [engine.record(k).side for k in members]
    errors, _ = count_errors(labels, crowd.truth[[crowd.index[k] for k in members]])
    return errors == 0


def simulate(args: argparse.Namespace) -> dict[str, Any]:
    """Run the engine against the crowd until done; return the raw outcome."""
    from streamgroup.core.engine import Engine  # here, so the statistics load without it

    sources = mixed_sources(MIXED_SOURCES) if args.mixed else None
    crowd = Crowd(args.n, delta=args.delta, sources=sources, seed=args.seed)
    extra = {} if args.alpha_slack is None else {"alpha_slack": args.alpha_slack}
    config = EngineConfig(
        alpha=args.alpha,
        inflight=args.inflight,
        max_outstanding=args.max_outstanding,
        item_ceiling=args.item_ceiling,
        seed=args.seed,
        **extra,
    )
    engine = Engine(config)
    engine.add_items([(k, None) for k in crowd.keys])
    now = 0
    rounds = 0
    idle = 0
    stopped = None
    t0 = time.perf_counter()
    t_engine = 0.0
    while True:
        t = time.perf_counter()
        if engine.done():
            break
        questions = engine.plan(now)
        t_engine += time.perf_counter() - t
        if not questions:
            idle += 1
            if idle > 3:  # nothing asked, nothing arriving: the engine is stuck
                stopped = "stalled"
                break
        else:
            idle = 0
        answers = crowd.answer_now(questions)
        t = time.perf_counter()
        engine.add_answers(answers, now)
        engine.take_changes()  # keep the change log from growing, as the worker does
        if hasattr(engine, "take_latencies"):
            engine.take_latencies()
        t_engine += time.perf_counter() - t
        rounds += 1
        now += args.round_ms
        if rounds >= args.max_rounds:
            stopped = "max_rounds"
            break
        if crowd.asked > args.max_spend_factor * args.n * 1000:
            stopped = "max_spend"
            break
    seconds = time.perf_counter() - t0
    records = [engine.record(k) for k in crowd.keys]
    return {
        "crowd": crowd,
        "engine": engine,
        "records": records,
        "rounds": rounds,
        "stopped": stopped,
        "seconds": seconds,
        "engine_seconds": t_engine,
    }


def yardsticks(args: argparse.Namespace, reference: int) -> dict[str, Any]:
    """The per-item limit and the two-phase baseline for this configuration."""
    if args.mixed:
        deltas = mixed_sources(MIXED_SOURCES)
        walk = baseline.mixed_limit(deltas, args.alpha, walks=LIMIT_WALKS, seed=args.seed)
        limit = args.n * walk.mean_length
        limit_se = args.n * walk.stderr
        d_fixed = baseline.pooled_delta(deltas)
    else:
        limit = sprt.per_item_limit(args.n, args.alpha, args.delta)
        limit_se = 0.0
        d_fixed = args.delta
    m = fixed_votes_scipy(args.alpha, d_fixed)
    # Each item votes against m distinct reference members, so the method's reference holds
    # at least m (ours may be smaller: it places by the SPRT, not by a fixed vote).
    r = max(reference, m)
    b = baseline.ab_size(r, d_fixed, REFERENCE_CONFIDENCE)
    two = baseline.two_phase_spend(args.n, r, b, m)
    return {
        "per_item_limit": limit,
        "per_item_limit_stderr": limit_se,
        "fixed_delta": d_fixed,
        "fixed_votes": m,
        "fixed_reference": r,
        "fixed_block": b,
        "fixed_bootstrap_questions": two.bootstrap,
        "fixed_baseline": two.spend,
        "fixed_feasible": two.feasible,
    }


def run(args: argparse.Namespace) -> dict[str, Any]:
    """One benchmark run: the JSON object of the command."""
    sim = simulate(args)
    engine, crowd, records = sim["engine"], sim["crowd"], sim["records"]
    stats = engine.stats()
    spend = int(stats["spend"])
    boot = bootstrap_spend(stats)
    reference = reference_size(engine)
    labels = [r.side if r is not None and r.status == "placed" else None for r in records]
    errors, placed = count_errors(labels, crowd.truth)
    unresolved = sum(1 for r in records if r is not None and r.status == "unresolved")
    lo, hi = clopper_pearson(errors, placed)
    ys = yardsticks(args, reference)
    ref_ok = reference_correct(engine, crowd)
    answers = np.array([r.answers if r is not None else 0 for r in records], dtype=np.int64)
    out: dict[str, Any] = {
        "n": args.n,
        "delta": None if args.mixed else args.delta,
        "alpha": args.alpha,
        "inflight": args.inflight,
        "mixed": bool(args.mixed),
        "seed": args.seed,
        "questions": spend,
        "bootstrap_questions": boot,
        "bootstrap_share": boot / spend if spend else 0.0,
        "reference": reference,
        "reference_correct": ref_ok,
        "alpha_slack": getattr(engine.config, "alpha_slack", None),
        **ys,
        "errors": errors,
        "placed": placed,
        "unresolved": unresolved,
        "error_rate": errors / placed if placed else 0.0,
        "error_ci95": [lo, hi],
        "ratio_to_limit": spend / ys["per_item_limit"],
        "ratio_to_fixed": spend / ys["fixed_baseline"],
        "revisions": sum(r.rev for r in records if r is not None),
        "answers_per_item": {
            "mean": float(answers.mean()),
            "p99": float(np.percentile(answers, 99)),
            "max": int(answers.max()),
            # Items are first asked roughly in key order, so this shows when extra spend
            # happened (a young noise estimate shows up in the first deciles).
            "by_decile": [round(float(c.mean()), 4) for c in np.array_split(answers, 10)],
        },
        "rounds": sim["rounds"],
        "stopped": sim["stopped"],
        "seconds": round(sim["seconds"], 3),
        "engine_seconds": round(sim["engine_seconds"], 3),
    }
    try:
        blob = json.dumps(stats, default=str)
        if len(blob) < 8000:
            out["engine_stats"] = json.loads(blob)
    except (TypeError, ValueError):
        pass
    return out


def summary(res: dict[str, Any]) -> str:
    what = "mixed crowd" if res["mixed"] else f"delta={res['delta']}"
    lo, hi = res["error_ci95"]
    return "\n".join([
        f"n={res['n']} {what} alpha={res['alpha']} W={res['inflight']} seed={res['seed']}",
        f"  spend        {res['questions']:>12,}  (bootstrap {res['bootstrap_questions']:,}, "
        f"{100 * res['bootstrap_share']:.2f}%)",
        f"  limit        {res['per_item_limit']:>12,.0f}  ratio {res['ratio_to_limit']:.4f}",
        f"  two-phase    {res['fixed_baseline']:>12,}  ratio {res['ratio_to_fixed']:.4f}  "
        f"(A x B {res['fixed_bootstrap_questions']:,}, m={res['fixed_votes']})",
        f"  errors       {res['errors']:>12,} of {res['placed']:,} placed  "
        f"rate {res['error_rate']:.2e}  95% CI [{lo:.2e}, {hi:.2e}]",
        f"  unresolved   {res['unresolved']:>12,}  revisions {res['revisions']:,}",
        f"  rounds       {res['rounds']:>12,}  {res['seconds']:.1f} s"
        + (f"  STOPPED: {res['stopped']}" if res["stopped"] else ""),
    ])


def parse(argv: list[str] | None) -> argparse.Namespace:
    p = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    p.add_argument("--n", type=int, required=True, help="items")
    p.add_argument("--delta", type=float, default=0.6, help="bias of every source (hidden)")
    p.add_argument("--alpha", type=float, default=1e-3, help="per-item error target")
    p.add_argument("--inflight", type=int, default=1, help="W: questions in flight per item")
    p.add_argument("--mixed", action="store_true",
                   help="200 sources: 70%% delta=0.6, 20%% 0, 10%% -0.4 (--delta ignored)")
    p.add_argument("--seed", type=int, default=1)
    p.add_argument("--json", action="store_true", help="print one JSON object")
    p.add_argument("--max-outstanding", type=int, default=10_000,
                   help="global cap on questions in flight")
    p.add_argument("--item-ceiling", type=int, default=200,
                   help="answers for one item before it becomes unresolved")
    p.add_argument("--alpha-slack", type=float, default=None,
                   help="the engine's alpha_slack (default: the engine's own default)")
    p.add_argument("--round-ms", type=int, default=1000, help="simulated time per round")
    p.add_argument("--max-rounds", type=int, default=200_000, help="safety cap")
    p.add_argument("--max-spend-factor", type=float, default=1.0,
                   help="safety cap: stop past factor * 1000 questions per item")
    a = p.parse_args(argv)
    if a.n < 2:
        p.error("--n must be at least 2")
    if not a.mixed and not (0.0 < a.delta < 1.0):
        p.error("--delta must be in (0, 1)")
    if not (0.0 < a.alpha < 0.5) or math.isnan(a.alpha):
        p.error("--alpha must be in (0, 0.5)")
    if not (1 <= a.inflight <= 64):
        p.error("--inflight must be in 1..64")
    if a.max_outstanding < 1 or a.item_ceiling < 1 or a.round_ms < 1 or a.max_rounds < 1:
        p.error("--max-outstanding, --item-ceiling, --round-ms and --max-rounds must be >= 1")
    return a


def main(argv: list[str] | None = None) -> int:
    args = parse(argv)
    res = run(args)
    print(json.dumps(res) if args.json else summary(res))
    return 0


if __name__ == "__main__":
    sys.exit(main())
