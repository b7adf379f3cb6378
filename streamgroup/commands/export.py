"""``streamgroup export``: every item's record as JSONL or CSV, for spreadsheets and audits."""

from __future__ import annotations

import argparse
import contextlib
import csv
import json
import os
import sys
import tempfile
from collections.abc import Iterator
from typing import IO, Any

from ..keys import STATUSES
from . import (
    CONNECTION_SETTINGS,
    UserError,
    add_setting_flags,
    example,
    make_client,
    settings_from_args,
)

NAME = "export"
HELP = "write every item's assignment (key, side, status, llr, answers, rev, pinned)"
COLUMNS = ("key", "side", "status", "llr", "answers", "rev", "pinned")


def register(p: argparse.ArgumentParser) -> None:
    p.epilog = example("""
streamgroup export --format csv --out assignments.csv
streamgroup export --status unresolved        # the items a person should look at""")
    p.add_argument("--format", choices=("jsonl", "csv"), default="jsonl", help="output format")
    p.add_argument("--out", metavar="FILE", default=None,
                   help="write here (atomically, on success) instead of standard output")
    p.add_argument("--status", action="append", choices=STATUSES, default=None,
                   help="only items with this status (repeatable)")
    add_setting_flags(p, CONNECTION_SETTINGS)


def write_records(records: Iterator[dict[str, Any]], fmt: str, out: IO[str]) -> int:
    n = 0
    if fmt == "csv":
        w = csv.writer(out, lineterminator="\n")
        w.writerow(COLUMNS)
        for r in records:
            w.writerow(["" if r.get(c) is None else r.get(c) for c in COLUMNS])
            n += 1
    else:
        for r in records:
            out.write(json.dumps({c: r.get(c) for c in COLUMNS}, ensure_ascii=False) + "\n")
            n += 1
    return n


def run(args: argparse.Namespace) -> int:
    settings = settings_from_args(args, CONNECTION_SETTINGS)
    wanted = set(args.status or STATUSES)
    with make_client(settings) as client:
        client.redis.ping()  # fail before creating any file when Redis is unreachable
        records = (r for r in client.assignments() if r.get("status") in wanted)
        if args.out is None:
            n = write_records(records, args.format, sys.stdout)
            sys.stdout.flush()
        else:
            target = os.path.abspath(args.out)
            if os.path.isdir(target):
                raise UserError(f"--out {args.out}: is a directory")
            fd, tmp = tempfile.mkstemp(dir=os.path.dirname(target), prefix=".export-")
            try:
                with os.fdopen(fd, "w", encoding="utf-8", newline="") as fh:
                    n = write_records(records, args.format, fh)
                os.replace(tmp, target)
            finally:
                with contextlib.suppress(FileNotFoundError):
                    os.unlink(tmp)
    print(f"exported {n} items", file=sys.stderr)
    return 0
