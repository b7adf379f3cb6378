"""The metrics/health endpoint, driven by a WorkerMetrics the test updates itself."""

from __future__ import annotations

import socket
import urllib.error
import urllib.request

import pytest
from prometheus_client.parser import text_string_to_metric_families

from streamgroup.serve.http import Health, parse_addr, start_http
from streamgroup.serve.metrics import WorkerMetrics


class FakeClock:
    def __init__(self) -> None:
        self.t = 1000.0

    def __call__(self) -> float:
        return self.t


def get(url: str) -> tuple[int, str, str]:
    try:
        with urllib.request.urlopen(url, timeout=5) as resp:
            return resp.status, resp.headers.get("Content-Type", ""), resp.read().decode()
    except urllib.error.HTTPError as err:
        return err.code, err.headers.get("Content-Type", ""), err.read().decode()


def samples(text: str) -> dict[tuple[str, tuple[tuple[str, str], ...]], float]:
    out = {}
    for fam in text_string_to_metric_families(text):
        for s in fam.samples:
            out[(s.name, tuple(sorted(s.labels.items())))] = s.value
    return out


@pytest.fixture
def served():
    metrics = WorkerMetrics()
    clock = FakeClock()
    health = Health(stale_after=10, clock=clock, metrics=metrics)
    server = start_http("127.0.0.1:0", metrics, health)
    yield metrics, health, clock, server
    server.close()


def test_metrics_exposition_parses_and_follows_updates(served):
    """/metrics serves the registry in the text format and reflects each update."""
    metrics, _, _, server = served
    code, ctype, body = get(server.url + "/metrics")
    assert code == 200 and ctype.startswith("text/plain")
    before = samples(body)
    assert before[("streamgroup_answers_applied_total", ())] == 0
    metrics.answers_applied.inc(7)
    metrics.questions_issued.labels(why="place").inc(3)
    metrics.batch_seconds.observe(0.02)
    after = samples(get(server.url + "/metrics")[2])
    assert after[("streamgroup_answers_applied_total", ())] == 7
    assert after[("streamgroup_questions_issued_total", (("why", "place"),))] == 3
    assert after[("streamgroup_batch_seconds_count", ())] == 1


def test_healthz_fails_when_the_loop_stops_beating(served):
    """/healthz is 200 while heartbeats are recent and 503 once they go stale."""
    _, health, clock, server = served
    assert get(server.url + "/healthz")[0] == 200
    clock.t += 11
    code, _, body = get(server.url + "/healthz")
    assert code == 503 and "stale" in body
    health.beat()
    assert get(server.url + "/healthz")[0] == 200


def test_readyz_needs_ready_flag_and_a_live_loop(served):
    """/readyz is 503 until set_ready(True), and again when the loop is stale or draining."""
    metrics, health, clock, server = served
    assert get(server.url + "/readyz")[0] == 503
    health.set_ready(True)
    assert get(server.url + "/readyz")[0] == 200
    assert samples(get(server.url + "/metrics")[2])[("streamgroup_ready", ())] == 1
    clock.t += 11
    assert get(server.url + "/readyz")[0] == 503
    health.beat()
    health.set_ready(False)
    assert get(server.url + "/readyz")[0] == 503
    assert metrics.ready._value.get() == 0


def test_unknown_path_is_404(served):
    """Paths other than the three endpoints answer 404, not the metrics."""
    server = served[3]
    assert get(server.url + "/secrets")[0] == 404


def test_default_address_is_loopback_and_busy_port_fails_at_start():
    """Settings' default binds 127.0.0.1 only, and a taken port raises at start_http."""
    from streamgroup.settings import Settings

    assert parse_addr(Settings().metrics_addr) == ("127.0.0.1", 9464)
    metrics, health = WorkerMetrics(), Health()
    with start_http("127.0.0.1:0", metrics, health) as server:
        assert server.host == "127.0.0.1"
        with pytest.raises(OSError):
            start_http(f"127.0.0.1:{server.port}", WorkerMetrics(), Health())
    with socket.socket() as s:  # closed server released its port
        s.bind(("127.0.0.1", server.port))


@pytest.mark.parametrize("addr", ["9464", "host:", ":9464", "h:99999", "h:x"])
def test_bad_addresses_are_rejected(addr):
    """A malformed metrics address is a clear ValueError, not a bind on something odd."""
    with pytest.raises(ValueError, match="HOST:PORT"):
        parse_addr(addr)


def test_ipv6_loopback_form_parses():
    """[::1]:PORT is accepted for IPv6 loopback."""
    assert parse_addr("[::1]:9464") == ("::1", 9464)
