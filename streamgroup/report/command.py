"""``streamgroup report --out DIR``: the subcommand (listed in streamgroup.cli.SUBCOMMANDS)."""

from __future__ import annotations

import argparse

from ..commands import CONNECTION_SETTINGS, add_setting_flags, example, settings_from_args

NAME = "report"
HELP = "write a self-contained HTML report of a run (plots of progress, spend, noise)"
SETTINGS = (*CONNECTION_SETTINGS, "alpha")


def register(p: argparse.ArgumentParser) -> None:
    p.epilog = example("""
streamgroup report --redis redis://127.0.0.1:6379/0 --ns sg --out ./report
# writes ./report/report.html: open it in any browser, no network needed""")
    p.add_argument("--out", required=True, metavar="DIR",
                   help="directory to write report.html into (created if missing)")
    add_setting_flags(p, SETTINGS)


def run(args: argparse.Namespace) -> int:
    from . import build_report  # matplotlib loads only when a report is drawn

    settings = settings_from_args(args, SETTINGS)
    # The limit uses the worker's own alpha when it recorded one; --alpha overrides it.
    alpha = settings.alpha if getattr(args, "alpha", None) is not None else None
    path = build_report(settings.redis, settings.ns, args.out, alpha=alpha,
                        default_alpha=settings.alpha)
    print(path)
    return 0
