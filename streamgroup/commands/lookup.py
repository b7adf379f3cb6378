"""``streamgroup lookup KEY...``: where items stand, one JSON line per key."""

from __future__ import annotations

import argparse
import json
import sys

from . import CONNECTION_SETTINGS, add_setting_flags, example, make_client, settings_from_args

NAME = "lookup"
HELP = "print where items stand (side, status, evidence), one JSON line per key"


def register(p: argparse.ArgumentParser) -> None:
    p.epilog = example("""
streamgroup lookup shard-000042 shard-000043
# {"key": "shard-000042", "found": true, "side": "1", "status": "placed", "llr": 7.2, ...}
# a key the worker has never seen prints {"key": ..., "found": false}""")
    p.add_argument("keys", nargs="+", metavar="KEY", help="item keys")
    add_setting_flags(p, CONNECTION_SETTINGS)


def run(args: argparse.Namespace) -> int:
    settings = settings_from_args(args, CONNECTION_SETTINGS)
    with make_client(settings) as client:
        records = client.lookup_many(args.keys)
    for key, rec in zip(args.keys, records, strict=True):
        line = {"key": key, "found": False} if rec is None else {
            "key": key, "found": True, **{k: v for k, v in rec.items() if k != "key"}}
        sys.stdout.write(json.dumps(line, ensure_ascii=False) + "\n")
    return 0
