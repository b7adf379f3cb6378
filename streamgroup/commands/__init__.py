"""Shared pieces of the subcommands: setting flags, the user-error type, the client factory.

Each subcommand lives in its own module with ``NAME``, ``HELP``, ``register(parser)`` and
``run(args) -> int``; :mod:`streamgroup.cli` lists the modules in one table.
"""

from __future__ import annotations

import argparse
import os
from collections.abc import Iterable, Mapping
from dataclasses import fields
from typing import TYPE_CHECKING

from ..errors import StreamgroupError
from ..settings import ENV_PREFIX, Settings, load_settings

if TYPE_CHECKING:
    from ..client import Client


class UserError(StreamgroupError):
    """A mistake of the person at the keyboard: printed as one line, exit code 2."""


# What every setting means; also the source of the README's configuration table (a test
# checks that every Settings field is described here and in the README).
SETTING_HELP: dict[str, str] = {
    "redis": "Redis URL (redis://, rediss:// for TLS, unix://); a password in it is never logged",
    "ns": "namespace: every key is {NS}:name",
    "alpha": "per-item error target of the sequential test, in (0, 0.5)",
    "alpha_slack": "randomised boundary: an item within alpha*(1+slack) commits with the "
                   "chance that makes its expected error alpha; 0 = strict; in [0, 0.25]",
    "inflight": "W: questions in flight per item (capped by the fewest answers that could "
                "still end its test)",
    "max_outstanding": "cap on questions in flight across all items",
    "budget": "total questions the worker may issue; 0 = unlimited",
    "item_ceiling": "answers counted for one item before it is marked unresolved",
    "question_timeout": "seconds before an unanswered question is asked again",
    "check_rate": "fraction of questions spent re-checking confident items, in [0, 0.5]",
    "seed": "seed of the planner's random choices (runs are reproducible for a seed)",
    "batch": "entries read per XREADGROUP and committed per MULTI/EXEC, at the most",
    "hold_ms": "milliseconds of Redis's own time one batch transaction should take (a "
               "lookup waits behind it): each read asks for as many entries as keep it "
               "there, between min(batch, 100) and batch; 0 = always batch",
    "block_ms": "milliseconds one XREADGROUP waits for new entries",
    "consumer": "consumer name in the group (default: hostname-pid); keep it stable "
                "across restarts so the worker rereads its own pending entries",
    "claim_idle": "seconds before entries pending at another (dead) consumer are claimed",
    "lease_ttl": "seconds a worker's hold on the namespace lasts unless renewed (a second "
                 "worker waits for it)",
    "pack_questions": "write questions as packed entries (field pack) for fast adapters",
    "question_columns": "with pack_questions: write each pack as a map of arrays (qid, a, "
                        "b, why, ts) instead of an array of maps",
    "snapshot_every": "seconds between engine snapshots in Redis",
    "metrics_addr": "HOST:PORT of /metrics, /healthz and /readyz; empty disables it",
    "log_level": "debug, info, warning or error",
    "log_format": "json, console, or auto (console on a terminal)",
    "grace": "seconds allowed to commit the batch in hand after SIGTERM",
    "aid_window": "how many recent producer aids are remembered to drop repeated answers",
    "questions_maxlen": "approximate cap (MAXLEN ~) of {NS}:questions; 0 = uncapped",
    "decisions_maxlen": "approximate cap (MAXLEN ~) of {NS}:decisions; 0 = uncapped",
    "dead_maxlen": "approximate cap (MAXLEN ~) of {NS}:dead; 0 = uncapped",
    "history_every": "seconds between progress samples written to {NS}:history",
    "keep_memory": "keep memory the worker frees for its next batches (glibc): steadier "
                   "speed after pauses; the resident size stays at its high-water mark",
    "nice": "scheduling niceness the worker takes at start, 0-19: on a host shared with "
            "Redis or its readers, 19 lets them have a core first when they wake (lower "
            "lookup latency), while the worker still uses every cycle they leave",
}

CONNECTION_SETTINGS = ("redis", "ns")


def flag_name(field: str) -> str:
    return "--" + field.replace("_", "-")


def env_name(field: str) -> str:
    return ENV_PREFIX + field.upper()


def add_setting_flags(parser: argparse.ArgumentParser, names: Iterable[str]) -> None:
    """Add one flag per setting; defaults stay None so env and file can fill the gap."""
    defaults = {f.name: f.default for f in fields(Settings)}
    group = parser.add_argument_group(
        "settings", f"flags win over {ENV_PREFIX}* environment variables, which win over "
        "the --config file, which wins over the defaults")
    for name in names:
        default = defaults[name]
        # A setting added without help still gets its flag (tests/test_settings.py fails
        # until it is described), so the command line never breaks over documentation.
        about = SETTING_HELP.get(name, "(not described yet)")
        text = f"{about} [env {env_name(name)}; default {default!r}]"
        if isinstance(default, bool):
            group.add_argument(flag_name(name), dest=name, default=None,
                               action=argparse.BooleanOptionalAction, help=text)
        else:
            group.add_argument(flag_name(name), dest=name, default=None, metavar=name.upper(),
                               help=text.replace("%", "%%"))
    if "config" not in {a.dest for a in parser._actions}:
        group.add_argument("--config", default=None, metavar="FILE",
                           help=f"TOML file of settings (a [streamgroup] table or top-level "
                                f"keys) [env {ENV_PREFIX}CONFIG]")


def settings_from_args(args: argparse.Namespace, names: Iterable[str],
                       env: Mapping[str, str] | None = None,
                       **overrides: object) -> Settings:
    """Flags, then environment, then --config file, then defaults (raises ConfigError)."""
    flags = {n: getattr(args, n, None) for n in names}
    flags.update({k: v for k, v in overrides.items() if v is not None})
    return load_settings(flags, os.environ if env is None else env,
                         getattr(args, "config", None))


def make_client(settings: Settings) -> Client:
    """A :class:`~streamgroup.client.Client` for the configured deployment (imported here,
    so that ``--help`` does not load redis)."""
    from ..client import Client

    return Client(settings.redis, settings.ns)


def example(text: str) -> str:
    """An epilog with a usage example (kept verbatim by RawDescriptionHelpFormatter)."""
    return "example:\n" + "\n".join("  " + line for line in text.strip().splitlines())
