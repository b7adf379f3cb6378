"""`streamgroup run`: the worker behind the command line, its signals and start-up errors."""

from __future__ import annotations

import contextlib
import os
import signal
import socket
import subprocess
import sys
import time
from collections.abc import Iterator
from pathlib import Path

import pytest

from streamgroup.cli import main
from streamgroup.client import Client
from streamgroup.commands.run import install_signal_handlers
from streamgroup.core.types import Question
from streamgroup.sim import Crowd

pytestmark = pytest.mark.redis


def _script() -> list[str]:
    exe = Path(sys.executable).with_name("streamgroup")
    return [str(exe)] if exe.exists() else [sys.executable, "-m", "streamgroup"]


@pytest.mark.slow
def test_run_places_items_then_stops_cleanly_on_sigterm(redis_url: str, tmp_path: Path) -> None:
    """The worker started by the CLI answers a crowd through the streams; SIGTERM exits 0."""
    cfg = tmp_path / "sg.toml"
    cfg.write_text('[streamgroup]\nns = "cli"\nblock-ms = 50\nmetrics-addr = ""\n'
                   "history-every = 0.2\n")
    env = {k: v for k, v in os.environ.items() if not k.startswith("STREAMGROUP_")}
    env["STREAMGROUP_CONSUMER"] = "cli-worker"
    proc = subprocess.Popen([*_script(), "run", "--redis", redis_url, "--config", str(cfg),
                             "--log-format", "json", "--pack-questions"],
                            stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, env=env)
    try:
        crowd = Crowd(40, delta=0.8, seed=3)
        client = Client(redis_url, ns="cli")
        client.push_items(crowd.keys)
        client.ensure_group("crowd")
        deadline = time.monotonic() + 60
        done = False
        while time.monotonic() < deadline and not done:
            batch = client.read_questions("crowd", "c1", count=500, block_ms=50)
            qs = [Question(q["qid"], q["a"], q["b"], q["why"], int(q["ts"])) for _, b in batch
                  for q in b]
            if qs:
                client.push_answers(crowd.answer_now(qs), packed=True)
                client.ack_questions("crowd", [eid for eid, _ in batch])
            recs = client.lookup_many(crowd.keys)
            done = all(r is not None and r["status"] in ("placed", "unresolved") for r in recs)
        assert done, "the worker did not decide every item within 60 s"
        # `status` shows the learned noise the worker publishes with its progress samples.
        while time.monotonic() < deadline and not client.status()["sources"]:
            time.sleep(0.05)
        (src,) = client.status()["sources"]
        assert src["source"] == "src-000" and 0.5 < src["delta"] <= 1.0
        assert proc.poll() is None
        proc.send_signal(signal.SIGTERM)
        assert proc.wait(20) == 0
        err = proc.stderr.read().decode()
        assert '"worker stopped"' in err and "stop requested" in err  # JSON log lines
        assert client.redis.hget("{cli}:meta", "seq") is not None
        client.close()
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait(5)


@contextlib.contextmanager
def _handlers_restored() -> Iterator[None]:
    """The process's SIGTERM and SIGINT handlers as they were, once the block is done."""
    old_term, old_int = signal.getsignal(signal.SIGTERM), signal.getsignal(signal.SIGINT)
    try:
        yield
    finally:
        signal.signal(signal.SIGTERM, old_term)
        signal.signal(signal.SIGINT, old_int)


def _wait_for_calls(calls: list[object], count: int) -> None:
    deadline = time.monotonic() + 5
    while len(calls) < count and time.monotonic() < deadline:
        time.sleep(0.01)


def test_second_signal_exits_at_once() -> None:
    """First SIGTERM only asks the worker to stop; the second calls the hard exit."""
    calls: list[object] = []
    with _handlers_restored():
        install_signal_handlers(lambda: calls.append("stop"), lambda code: calls.append(code))
        os.kill(os.getpid(), signal.SIGTERM)
        _wait_for_calls(calls, 1)
        assert calls == ["stop"]
        os.kill(os.getpid(), signal.SIGINT)
        _wait_for_calls(calls, 2)
        assert calls == ["stop", 128 + signal.SIGINT]


def test_a_stop_not_done_within_the_grace_period_exits_at_once() -> None:
    """After the first signal, the hard exit comes by itself once `grace` is over."""
    calls: list[object] = []
    with _handlers_restored():
        install_signal_handlers(lambda: calls.append("stop"), calls.append, grace=0.2)
        os.kill(os.getpid(), signal.SIGTERM)
        _wait_for_calls(calls, 2)
        assert calls == ["stop", 128 + signal.SIGTERM]


def test_busy_metrics_port_is_a_user_error(redis_url: str, capsys) -> None:
    """A metrics address already in use: one line, exit 2, before the worker starts."""
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        s.listen()
        port = s.getsockname()[1]
        code = main(["run", "--redis", redis_url, "--metrics-addr", f"127.0.0.1:{port}"])
    err = capsys.readouterr().err.strip()
    assert code == 2 and len(err.splitlines()) == 1 and "cannot listen" in err
