"""``streamgroup run``: the long-lived worker.

Exit codes: 0 after a requested stop; 2 a user mistake found before the worker starts
(bad setting, unreachable Redis, metrics address taken); 3 the state in Redis is
inconsistent (for example the namespace's data vanished): the worker refuses to start
over silently; 4 another worker took the namespace's lease; 1 an unexpected error
(logged with its traceback).

Signals: the first SIGTERM or SIGINT asks the worker to stop (it commits the batch in hand
within the grace period and exits 0; once the grace period is over, it exits at once); a
second one exits at once. A hard exit is safe by design: whatever was not committed is
still pending in its stream and is applied once by the next run.
"""

from __future__ import annotations

import argparse
import os
import signal
import socket
import sys
import threading
from collections.abc import Callable
from dataclasses import fields
from types import FrameType

from ..settings import Settings
from . import UserError, add_setting_flags, example, make_client, settings_from_args

NAME = "run"
HELP = "run the worker: read items and answers, ask questions, commit decisions"
ALL_SETTINGS = tuple(f.name for f in fields(Settings))


def register(p: argparse.ArgumentParser) -> None:
    p.epilog = example("""
streamgroup run --redis redis://127.0.0.1:6379/0 --ns sg --alpha 0.001
STREAMGROUP_REDIS=rediss://:secret@redis.internal:6380/0 streamgroup run --config sg.toml""")
    add_setting_flags(p, ALL_SETTINGS)


def install_signal_handlers(stop: Callable[[], None],
                            hard_exit: Callable[[int], None] = os._exit,
                            grace: float | None = None) -> None:
    """First SIGTERM/SIGINT: ``stop()`` (the worker drains); second, or ``grace`` seconds
    after the first without the worker having ended: ``hard_exit`` now.

    The handler only sets state or leaves; it never raises into the loop. (A drain can
    hang on a Redis that does not answer: the grace timer bounds it; what it cuts short is
    still pending and is applied once by the next run.)
    """
    seen = {"n": 0}

    def leave(why: str, signum: int) -> None:
        os.write(2, f"streamgroup run: {why}, exiting now\n".encode())
        hard_exit(128 + signum)

    def handler(signum: int, _frame: FrameType | None) -> None:
        seen["n"] += 1
        if seen["n"] == 1:
            stop()
            if grace is not None:
                timer = threading.Timer(grace, leave, (f"no clean stop within the grace "
                                                       f"period ({grace:g} s)", signum))
                timer.daemon = True
                timer.start()
        else:
            leave(f"second {signal.Signals(signum).name}", signum)

    signal.signal(signal.SIGTERM, handler)
    signal.signal(signal.SIGINT, handler)


def check_metrics_addr(addr: str) -> None:
    """Fail at once, as a user error, when the metrics address cannot be bound."""
    if not addr:
        return
    host, _, port = addr.rpartition(":")
    family = socket.AF_INET6 if ":" in host.strip("[]") else socket.AF_INET
    try:
        with socket.socket(family, socket.SOCK_STREAM) as s:
            s.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
            s.bind((host.strip("[]"), int(port)))
    except OSError as exc:
        raise UserError(f"--metrics-addr {addr}: cannot listen there "
                        f"({exc.strerror or exc})") from None


def run(args: argparse.Namespace) -> int:
    settings = settings_from_args(args, ALL_SETTINGS)
    # Fail fast, as one line, on a wrong URL or a Redis that is not there; once running,
    # the worker rides out lost connections with backoff instead.
    with make_client(settings) as client:
        client.redis.ping()
    check_metrics_addr(settings.metrics_addr)
    from ..logs import configure_logging
    from ..stream.worker import Worker, tune_process

    configure_logging(settings.log_level, settings.log_format, sys.stderr)
    worker = Worker(settings)
    install_signal_handlers(worker.request_stop, grace=settings.grace)
    tune_process(settings)
    return int(worker.run())
