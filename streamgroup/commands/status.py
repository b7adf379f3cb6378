"""``streamgroup status``: one look at a deployment, read-only.

Items by status, spend, questions outstanding, consumer lag and the learned noise of the
sources, from what the worker commits with every batch (``{NS}:meta``, ``{NS}:noise``) and
from XINFO on the streams. It never writes to Redis.
"""

from __future__ import annotations

import argparse
import json
import sys
import time
from typing import Any

from ..keys import GROUP, STATUSES
from . import CONNECTION_SETTINGS, add_setting_flags, example, make_client, settings_from_args

NAME = "status"
HELP = "show items by status, spend, outstanding questions, consumer lag, learned noise"


def register(p: argparse.ArgumentParser) -> None:
    p.epilog = example("""
streamgroup status --redis redis://127.0.0.1:6379/0 --ns sg
streamgroup status --json | jq .items""")
    p.add_argument("--json", action="store_true", help="print one JSON object")
    p.add_argument("--sources", type=int, default=10, metavar="N",
                   help="show the N sources with the most answers (default 10)")
    add_setting_flags(p, CONNECTION_SETTINGS)


def _fmt_groups(streams: dict[str, Any], own: bool) -> list[str]:
    lines = []
    for name, s in streams.items():
        for g in s["groups"]:
            if (g["group"] == GROUP) != own:
                continue
            lines.append(f"  {name:<9} group {g['group']}: lag {g['lag']}, "
                         f"pending {g['pending']}, consumers {g['consumers']}")
    return lines


def render(st: dict[str, Any], top: int) -> str:
    items = st["items"]
    total = sum(v or 0 for v in items.values())
    age = ""
    if isinstance(st.get("as_of_ms"), (int, float)):
        secs = max(0.0, time.time() - st["as_of_ms"] / 1000)
        age = f" (from the worker's progress sample of {secs:.1f} s ago)"
    lines = [f"namespace {st['ns']}: {total} items{age}"]
    lines.append("  " + ", ".join(f"{s} {items.get(s) or 0}" for s in STATUSES))
    spend = st["spend"]
    lines.append(f"spend: {spend if spend is not None else 'unknown (no worker summary yet)'}"
                 f" answers; questions outstanding: {st['questions_outstanding'] or 0}; "
                 f"dead letters: {st['dead_letters']}")
    own = _fmt_groups(st["streams"], own=True)
    lines.append("worker:" if own else "worker: no consumer group yet (has `run` started?)")
    lines += own
    adapters = _fmt_groups(st["streams"], own=False)
    if adapters:
        lines.append("crowd adapters:")
        lines += adapters
    if st["sources"]:
        lines.append(f"learned noise (top {min(top, len(st['sources']))} of "
                     f"{len(st['sources'])} sources by answers; bias 1 = always right, "
                     "0 = random, < 0 = reliably wrong):")
        for s in st["sources"][:top]:
            delta = s.get("delta")
            d = f"{delta:+.2f}" if isinstance(delta, (int, float)) else "?"
            lines.append(f"  {s['source'] or '(anonymous)':<24} bias {d}  "
                         f"answers {s.get('answers', '?')}")
    return "\n".join(lines)


def run(args: argparse.Namespace) -> int:
    settings = settings_from_args(args, CONNECTION_SETTINGS)
    with make_client(settings) as client:
        st = client.status()
    if args.json:
        sys.stdout.write(json.dumps(st, default=str) + "\n")
    else:
        sys.stdout.write(render(st, args.sources) + "\n")
    return 0
