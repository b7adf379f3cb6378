"""``streamgroup status``: one look at a deployment, read-only.

Items by status, spend, questions outstanding, consumer lag and the learned noise of the
sources, from what the worker commits with every batch (``{NS}:meta``, ``{NS}:noise``) and
from XINFO on the streams. It never writes to Redis.
"""

from __future__ import annotations

import argparse
import json
import sys
from typing import Any

import msgpack

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


def _text(v: Any) -> Any:
    return v.decode("utf-8", "replace") if isinstance(v, bytes) else v


def _number(v: Any) -> Any:
    s = _text(v)
    for conv in (int, float):
        try:
            return conv(s)
        except (TypeError, ValueError):
            pass
    return s


def _groups(r: Any, stream: str) -> list[dict[str, Any]]:
    """XINFO GROUPS of one stream (empty when the stream does not exist yet)."""
    import redis

    try:
        info = r.xinfo_groups(stream)
    except redis.ResponseError:
        return []
    out = []
    for g in info:
        g = {_text(k): _text(v) for k, v in g.items()}
        out.append({"group": g.get("name"), "consumers": g.get("consumers"),
                    "pending": g.get("pending"), "lag": g.get("lag"),
                    "last_delivered": g.get("last-delivered-id")})
    return out


def collect(client: Any) -> dict[str, Any]:
    """Everything ``status`` shows, as one dict."""
    r, k = client.redis, client.keys
    meta = {_text(a): _number(b) for a, b in r.hgetall(k.meta).items()}
    items = {s: meta.get(f"items_{s}") for s in STATUSES}
    if all(v is None for v in items.values()):
        # No summary from a worker yet: count the records themselves.
        counts = dict.fromkeys(STATUSES, 0)
        for rec in client.assignments():
            counts[rec["status"]] = counts.get(rec["status"], 0) + 1
        items = counts
    sources = []
    for name, raw in r.hgetall(k.noise).items():
        try:
            value = msgpack.unpackb(raw, raw=False)
        except (ValueError, msgpack.UnpackException):
            continue
        row = value if isinstance(value, dict) else {"delta": value}
        sources.append({"source": _text(name), **row})
    sources.sort(key=lambda s: -(s.get("answers") or 0))
    streams = {}
    for name in ("items", "answers", "questions"):
        key = getattr(k, name)
        streams[name] = {"length": int(r.xlen(key)) if r.exists(key) else 0,
                         "groups": _groups(r, key)}
    return {
        "ns": client.ns,
        "items": items,
        "spend": meta.get("spend"),
        "questions_outstanding": meta.get("outstanding"),
        "dead_letters": int(r.xlen(k.dead)) if r.exists(k.dead) else 0,
        "meta": meta,
        "streams": streams,
        "sources": sources,
    }


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
    lines = [f"namespace {st['ns']}: {total} items"]
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
        st = collect(client)
    if args.json:
        sys.stdout.write(json.dumps(st, default=str) + "\n")
    else:
        sys.stdout.write(render(st, args.sources) + "\n")
    return 0
