"""``streamgroup push items|answers FILE|-``: send a CSV or JSONL file to the input streams.

The whole file is read and checked before anything is sent: a malformed file is reported
by its first bad line and nothing of it is pushed.
"""

from __future__ import annotations

import argparse
import csv
import io
import json
import sys
from typing import Any

from . import (
    CONNECTION_SETTINGS,
    UserError,
    add_setting_flags,
    example,
    make_client,
    settings_from_args,
)

NAME = "push"
HELP = "push items or answers from a CSV (with header) or JSONL file, or standard input"

COLUMNS = {
    "items": (("key",), ("side",)),
    "answers": (("a", "b", "same"), ("source", "qid", "aid")),
}


def register(p: argparse.ArgumentParser) -> None:
    p.epilog = example("""
printf 'key,side\\nshard-000001,north\\nshard-000002,\\n' | streamgroup push items -
streamgroup push answers answers.jsonl --packed
# answers.csv: a,b,same,source   (same is 1/0 or true/false; source, qid, aid optional)
streamgroup push answers answers.csv --redis redis://127.0.0.1:6379/0 --ns sg
streamgroup push answers batch-17.csv --aid-prefix batch-17   # safe to repeat""")
    p.add_argument("what", choices=("items", "answers"), help="which stream to write to")
    p.add_argument("file", metavar="FILE", help="CSV with a header row or JSONL; - = stdin")
    p.add_argument("--format", choices=("auto", "csv", "jsonl"), default="auto",
                   help="file format (auto: by extension, else by the first character)")
    p.add_argument("--packed", action="store_true",
                   help="answers only: write them as packed entries (field pack), faster")
    p.add_argument("--aid-prefix", metavar="P", default=None,
                   help="answers only: give each answer without an aid the aid P:LINE, so "
                        "pushing the same file again (after a failure) counts nothing twice")
    add_setting_flags(p, CONNECTION_SETTINGS)


def _read_text(path: str) -> str:
    try:
        if path == "-":
            data = sys.stdin.buffer.read()
        else:
            with open(path, "rb") as fh:
                data = fh.read()
    except OSError as exc:
        raise UserError(f"{path}: {exc.strerror or exc}") from None
    try:
        return data.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        raise UserError(f"{path}: not UTF-8 text (byte {exc.start})") from None


def detect_format(path: str, text: str) -> str:
    lower = path.lower()
    if lower.endswith((".jsonl", ".ndjson", ".json")):
        return "jsonl"
    if lower.endswith((".csv", ".txt")):
        return "csv"
    first = text.lstrip()[:1]
    return "jsonl" if first == "{" else "csv"


def parse_rows(what: str, text: str, fmt: str, path: str) -> list[tuple[int, dict[str, Any]]]:
    """``[(line number, row), ...]``; raises UserError naming the file and line."""
    required, optional = COLUMNS[what]
    allowed = set(required) | set(optional)
    rows: list[tuple[int, dict[str, Any]]] = []
    if fmt == "jsonl":
        for n, line in enumerate(text.splitlines(), 1):
            if not line.strip():
                continue
            try:
                obj = json.loads(line)
            except json.JSONDecodeError as exc:
                raise UserError(f"{path} line {n}: not JSON ({exc.msg})") from None
            if not isinstance(obj, dict):
                raise UserError(f"{path} line {n}: expected a JSON object")
            rows.append((n, obj))
    else:
        reader = csv.reader(io.StringIO(text, newline=""))
        header: list[str] | None = None
        try:
            for record in reader:
                n = reader.line_num
                if not any(c.strip() for c in record):
                    continue
                if header is None:
                    header = [c.strip() for c in record]
                    missing = [c for c in required if c not in header]
                    extra = [c for c in header if c not in allowed]
                    if missing or extra or len(set(header)) != len(header):
                        raise UserError(
                            f"{path} line {n}: header must name the columns "
                            f"{', '.join(required)} (optional: {', '.join(optional)}), "
                            f"got {', '.join(header) or 'nothing'}")
                    continue
                if len(record) != len(header):
                    raise UserError(f"{path} line {n}: {len(record)} fields, header has "
                                    f"{len(header)}")
                rows.append((n, {h: v for h, v in zip(header, record, strict=True)
                                 if v != "" or h in required}))
        except csv.Error as exc:
            raise UserError(f"{path} line {reader.line_num}: {exc}") from None
    if not rows:
        raise UserError(f"{path}: no {what} found")
    return rows


def check_rows(what: str, rows: list[tuple[int, dict[str, Any]]], path: str,
               aid_prefix: str | None = None) -> list[dict]:
    """Validate every row as the client would; the first bad one names its line."""
    from ..client import ClientInputError, as_answer_fields, as_item_fields

    convert = as_item_fields if what == "items" else as_answer_fields
    out = []
    for n, row in rows:
        if aid_prefix is not None and not row.get("aid"):
            row = {**row, "aid": f"{aid_prefix}:{n}"}
        try:
            out.append(convert(row))
        except ClientInputError as exc:
            raise UserError(f"{path} line {n}: {exc}") from None
    return out


def run(args: argparse.Namespace) -> int:
    if args.what != "answers" and (args.packed or args.aid_prefix is not None):
        raise UserError("--packed and --aid-prefix apply to answers only")
    settings = settings_from_args(args, CONNECTION_SETTINGS)
    text = _read_text(args.file)
    fmt = detect_format(args.file, text) if args.format == "auto" else args.format
    path = "stdin" if args.file == "-" else args.file
    entries = check_rows(args.what, parse_rows(args.what, text, fmt, path), path,
                         args.aid_prefix)
    with make_client(settings) as client:
        if args.what == "items":
            count = client.push_items(entries)
            stream = client.keys.items
        else:
            count = client.push_answers(entries, packed=args.packed)
            stream = client.keys.answers
    print(f"pushed {count} {args.what} to {stream}", file=sys.stderr)
    return 0
