"""Logging: JSON lines by default, console on a terminal, secrets never rendered."""

from __future__ import annotations

import io
import json
import logging
import re

import pytest
import structlog

from streamgroup.logs import configure_logging, scrub_text


@pytest.fixture(autouse=True)
def _reset_logging():
    yield
    structlog.reset_defaults()
    root = logging.getLogger()
    for h in [h for h in root.handlers if getattr(h, "_streamgroup", False)]:
        root.removeHandler(h)


class TTYBuffer(io.StringIO):
    def isatty(self) -> bool:
        return True


def lines(buf: io.StringIO) -> list[dict]:
    return [json.loads(line) for line in buf.getvalue().splitlines() if line.strip()]


def test_json_lines_carry_event_level_timestamp_and_bound_context():
    """Non-TTY auto format emits one JSON object per event with bound fields."""
    buf = io.StringIO()
    configure_logging("info", "auto", stream=buf)
    log = structlog.get_logger().bind(stream="{sg}:answers", consumer="w1")
    log.info("batch_committed", entries=12)
    (rec,) = lines(buf)
    assert rec["event"] == "batch_committed" and rec["level"] == "info"
    assert rec["stream"] == "{sg}:answers" and rec["entries"] == 12 and "timestamp" in rec


def test_level_filters_lower_events():
    """With level=warning, info events are dropped and warnings kept."""
    buf = io.StringIO()
    configure_logging("warning", "json", stream=buf)
    structlog.get_logger().info("quiet")
    structlog.get_logger().warning("loud")
    assert [r["event"] for r in lines(buf)] == ["loud"]


def test_console_rendering_on_a_terminal():
    """auto format on a TTY renders human-readable text, not JSON."""
    buf = TTYBuffer()
    configure_logging("info", "auto", stream=buf)
    structlog.get_logger().info("worker_started", ns="sg")
    out = buf.getvalue()
    assert "\x1b[" in out  # coloured for a person
    plain = re.sub(r"\x1b\[[0-9;]*m", "", out)
    assert "worker_started" in plain and "ns=sg" in plain
    with pytest.raises(json.JSONDecodeError):
        json.loads(out)


def test_console_format_into_a_file_has_no_colour_codes():
    """fmt=console on a non-terminal renders text without escape sequences."""
    buf = io.StringIO()
    configure_logging("info", "console", stream=buf)
    structlog.get_logger().info("worker_started", ns="sg")
    assert "ns=sg" in buf.getvalue() and "\x1b[" not in buf.getvalue()


@pytest.mark.parametrize("bad", [("loud", "json"), ("info", "xml")])
def test_bad_options_fail_fast(bad):
    """Unknown level or format is a ValueError at configuration, not a silent default."""
    with pytest.raises(ValueError):
        configure_logging(*bad, stream=io.StringIO())


def test_redis_password_never_reaches_a_log_line():
    """URLs, password fields, nested values, exceptions and stdlib logs are all scrubbed."""
    buf = io.StringIO()
    configure_logging("info", "json", stream=buf)
    log = structlog.get_logger()
    log.info("connecting", redis="redis://worker:hunter2@db:6379/0")
    log.info("settings", password="hunter2", nested={"auth": "hunter2", "ok": 1},
             urls=["rediss://:hunter2@db/1"])
    log.warning("free_text", detail="reconnect with password=hunter2 failed")
    try:
        raise ConnectionError("cannot reach redis://:hunter2@db:6379")
    except ConnectionError:
        log.exception("redis_lost")
    logging.getLogger("redis.connection").warning("AUTH worker hunter2 rejected")
    out = buf.getvalue()
    assert "hunter2" not in out
    recs = lines(buf)
    assert len(recs) == 5
    assert recs[0]["redis"] == "redis://worker:***@db:6379/0"
    assert recs[1]["nested"] == {"auth": "***", "ok": 1}
    assert "ConnectionError" in recs[3]["exception"]


@pytest.mark.parametrize("text, expect", [
    ("redis://:pw@h:1/0", "redis://:***@h:1/0"),
    ("unix://u:pw@/run/redis.sock", "unix://u:***@/run/redis.sock"),
    ("password='a b' rest", "password=*** rest"),
    ('{"password": "x"}', '{"password": ***}'),
    ("requirepass s3cr3t", "requirepass ***"),
    ("invalid username-password pair", "invalid username-password pair"),
    ("redis://h:6379/0", "redis://h:6379/0"),
    ("redis://u:p@ss@h:6379/0", "redis://u:***@h:6379/0"),
    ("see redis://:a@h/0 and rediss://:b@k/1", "see redis://:***@h/0 and rediss://:***@k/1"),
])
def test_scrub_text_table(text, expect):
    """Each secret shape is masked and harmless text is left as it is."""
    assert scrub_text(text) == expect
