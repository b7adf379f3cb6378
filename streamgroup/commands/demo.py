"""``streamgroup demo``: the whole loop on a private Redis with a simulated crowd."""

from __future__ import annotations

import argparse
import importlib.util
import signal
import threading

from . import UserError, example

NAME = "demo"
HELP = ("run a worker and a simulated crowd on a private Redis, then print a summary "
        "(exit code 3 if not every shard was decided within the time limit)")


def register(p: argparse.ArgumentParser) -> None:
    p.epilog = example("""
streamgroup demo
streamgroup demo --items 3000 --alpha 0.0001 --seed 7 --report demo-report""")
    p.add_argument("--items", type=int, default=2000, metavar="N",
                   help="ceramic shards to sort (default 2000)")
    p.add_argument("--alpha", type=float, default=1e-3, metavar="A",
                   help="per-item error target (default 0.001)")
    p.add_argument("--seed", type=int, default=1, metavar="S", help="random seed (default 1)")
    p.add_argument("--inflight", type=int, default=4, metavar="W",
                   help="questions in flight per shard (default 4)")
    p.add_argument("--report", metavar="DIR", default=None,
                   help="write the HTML run report into DIR (default: demo-report, when "
                        "matplotlib is installed: pip install -e '.[report]')")
    p.add_argument("--no-report", action="store_true", help="do not write the HTML report")
    p.add_argument("--redis", metavar="URL", default=None,
                   help="use this Redis instead of a private one (in a fresh demo-* namespace, "
                        "deleted at the end)")
    p.add_argument("--embedded", choices=("auto", "redis-server", "fakeredis"), default="auto",
                   help="which private Redis to start (auto: redis-server if on PATH)")
    p.add_argument("--quiet", action="store_true", help="no progress lines, only the summary")


def run(args: argparse.Namespace) -> int:
    if not 10 <= args.items <= 200_000:
        raise UserError(f"--items must be between 10 and 200000 (got {args.items})")
    if not 0 < args.alpha < 0.5:
        raise UserError(f"--alpha must be in (0, 0.5) (got {args.alpha})")
    if not 1 <= args.inflight <= 64:
        raise UserError(f"--inflight must be between 1 and 64 (got {args.inflight})")
    can_draw = importlib.util.find_spec("matplotlib") is not None
    if args.report and not args.no_report and not can_draw:
        raise UserError("--report needs matplotlib: pip install -e '.[report]'")
    report = None if args.no_report else (args.report or ("demo-report" if can_draw else None))
    from ..demo import DemoOptions, run_demo
    from ..logs import configure_logging

    # The worker runs in this process: keep its log to warnings so progress stays readable.
    configure_logging("warning", "console")
    opts = DemoOptions(items=args.items, inflight=args.inflight, alpha=args.alpha,
                       seed=args.seed, report=report, redis_url=args.redis,
                       embedded=args.embedded, quiet=args.quiet)
    stop = threading.Event()

    def on_signal(_signum: int, _frame: object) -> None:
        # First signal: wind down cleanly (the private Redis must not be left running);
        # a second one gets the default behaviour.
        stop.set()
        signal.signal(signal.SIGINT, signal.SIG_DFL)
        signal.signal(signal.SIGTERM, signal.SIG_DFL)

    signal.signal(signal.SIGINT, on_signal)
    signal.signal(signal.SIGTERM, on_signal)
    summary = run_demo(opts, stop=stop)
    if stop.is_set():
        return 130
    # 3: the run was cut at the time limit (a very slow machine?); the summary says so.
    return 0 if summary.ok else 3
