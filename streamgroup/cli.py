"""The ``streamgroup`` command line: parse, build settings, call one thing.

Subcommands are listed in :data:`SUBCOMMANDS`: one module each, exposing ``NAME``, ``HELP``,
``register(parser)`` and ``run(args) -> int``. To add a command, write such a module and add
its import path to the table.

Exit codes: 0 success; 2 a user mistake (bad flag or setting, malformed file, bad URL,
unreachable Redis), reported as one line on stderr; 1 anything unexpected, with the
traceback, because that is a bug to report.
"""

from __future__ import annotations

import argparse
import importlib
import sys
from collections.abc import Sequence
from typing import NoReturn

from . import __version__
from .errors import StreamgroupError

SUBCOMMANDS: tuple[str, ...] = (
    "streamgroup.commands.run",
    "streamgroup.commands.push",
    "streamgroup.commands.lookup",
    "streamgroup.commands.export",
    "streamgroup.commands.status",
    "streamgroup.commands.demo",
    "streamgroup.report.command",
)

EXIT_OK, EXIT_BUG, EXIT_USER = 0, 1, 2


class _Parser(argparse.ArgumentParser):
    """argparse, but a usage mistake is one line (with a pointer to --help), exit 2."""

    def error(self, message: str) -> NoReturn:
        self.exit(EXIT_USER, f"{self.prog}: error: {message} (see {self.prog} --help)\n")


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(
        prog="streamgroup",
        description="Split items into two groups from noisy pairwise answers on Redis Streams.",
        epilog="example:\n  streamgroup demo\n  streamgroup run --redis redis://127.0.0.1:6379/0"
               "\n\nrun 'streamgroup COMMAND --help' for the options of one command",
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    parser.add_argument("--version", action="version", version=f"streamgroup {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    for path in SUBCOMMANDS:
        mod = importlib.import_module(path)
        p = sub.add_parser(mod.NAME, help=mod.HELP, description=mod.HELP,
                           formatter_class=argparse.RawDescriptionHelpFormatter)
        mod.register(p)
        p.set_defaults(_run=mod.run)
    return parser


def _one_line(exc: BaseException) -> str:
    from .settings import redact_url

    text = " ".join(str(exc).split()) or type(exc).__name__
    # A URL with a password can appear inside a library's message; mask it.
    return " ".join(redact_url(w) if "://" in w else w for w in text.split(" "))


def user_error_message(exc: BaseException) -> str | None:
    """The one-line message for a user mistake, or None if ``exc`` is a bug."""
    import redis

    if isinstance(exc, StreamgroupError):
        return _one_line(exc)
    if isinstance(exc, redis.AuthenticationError):
        return f"Redis refused the credentials: {_one_line(exc)}"
    if isinstance(exc, (redis.ConnectionError, redis.TimeoutError)):
        return f"cannot reach Redis: {_one_line(exc)}"
    if isinstance(exc, redis.exceptions.InvalidResponse):
        return f"the server at the Redis URL does not speak the Redis protocol ({_one_line(exc)})"
    if isinstance(exc, redis.ResponseError):
        return f"Redis refused a command: {_one_line(exc)}"
    if isinstance(exc, OSError) and getattr(exc, "filename", None):
        return f"{exc.filename}: {exc.strerror or exc}"
    return None


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if getattr(args, "_run", None) is None:
        parser.print_help(sys.stderr)
        return EXIT_USER
    try:
        return int(args._run(args) or 0)
    except KeyboardInterrupt:
        print("streamgroup: interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:
        # `streamgroup export | head`: the reader left; that is not an error.
        sys.stderr.close()
        return EXIT_OK
    except Exception as exc:
        msg = user_error_message(exc)
        if msg is None:
            raise  # a bug: the traceback goes to stderr and the exit code is 1
        print(f"streamgroup {args.command}: error: {msg}", file=sys.stderr)
        return EXIT_USER


def entry() -> NoReturn:
    sys.exit(main())


if __name__ == "__main__":  # pragma: no cover
    entry()
