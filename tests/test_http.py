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
    health.set_ready(True)
    assert get(server.url + "/healthz")[0] == 200
    clock.t += 11
    code, _, body = get(server.url + "/healthz")
    assert code == 503 and "stale" in body
    health.beat()
    assert get(server.url + "/healthz")[0] == 200


def test_slow_start_up_is_alive_but_not_ready(served):
    """Before the loop first becomes ready, a long state load is not reported as a hang."""
    _, health, clock, server = served
    clock.t += 600
    code, _, body = get(server.url + "/healthz")
    assert code == 200 and body.startswith("starting")
    assert get(server.url + "/readyz")[0] == 503
    health.set_ready(True)
    assert get(server.url + "/readyz")[0] == 200


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


# -- a running worker ---------------------------------------------------------------

# Metrics a run must move (first scrape after ready vs the scrape at the end): sample name
# and the label filter. The others must be present; revisions and reconnects legitimately
# stay at zero in a clean run, and the lag/pending gauges are back near zero at the end.
MOVING = [
    ("streamgroup_answers_applied_total", {}),
    ("streamgroup_answers_duplicate_total", {}),
    ("streamgroup_entries_rejected_total", {}),
    ("streamgroup_items_added_total", {}),
    ("streamgroup_questions_issued_total", {"why": "place"}),
    ("streamgroup_items", {"status": "placed"}),
    ("streamgroup_spend_answers", {}),
    ("streamgroup_decision_seconds_count", {}),
    ("streamgroup_batch_seconds_count", {}),
    ("streamgroup_batches_total", {}),
    ("streamgroup_source_answers", {}),
]


@pytest.mark.redis
@pytest.mark.slow
def test_scrape_a_running_worker_every_metric_present_and_moving(redis_url):
    """A live worker's /metrics parses, names every declared metric, and moves with the run."""
    pytest.importorskip("streamgroup.stream.worker")
    from tests.liveworker import LiveWorker, scrape, total

    declared = {fam.name for fam in WorkerMetrics().registry.collect()}
    with LiveWorker(redis_url) as live:
        fam0, first = scrape(live.url)
        assert declared <= fam0, declared - fam0
        assert total(first, "streamgroup_ready") == 1
        assert get(live.url + "/healthz")[0] == 200
        live.client.push_items(live.crowd.keys)
        live.client.redis.xadd(live.client.keys.answers, {"a": "shard-000001"})  # malformed
        for _ in range(2):  # the same producer id twice: the repeat is a duplicate
            live.client.push_answer("shard-000001", "shard-000002", True, "src-000", aid="x1")
        # Nobody answers yet: the worker's first questions must show as outstanding.
        def questions_out():
            s = scrape(live.url)[1]
            return s if total(s, "streamgroup_questions_outstanding") > 0 else None

        mid = live.wait(questions_out, 15, "questions outstanding")
        assert total(mid, "streamgroup_items", status="asking") > 0
        live.run_to_end()
        # Gauges refresh on a timer: wait for the learned noise to reach the endpoint.
        live.wait(lambda: scrape(live.url)[1].get("streamgroup_source_bias"), 10,
                  "per-source series")
        fam1, last = scrape(live.url)
    assert declared <= fam1
    for name, labels in MOVING:
        assert total(last, name, **labels) > total(first, name, **labels), name
    assert total(last, "streamgroup_noise_pooled_bias") > 0.2
    assert {dict(k)["source"] for k in last["streamgroup_source_bias"]} <= {
        *live.crowd.source_names, "other"}
    for gauge in ("streamgroup_consumer_lag_entries", "streamgroup_pending_entries"):
        assert {dict(k)["stream"] for k in last[gauge]} >= {"items", "answers"}, gauge
    assert "streamgroup_revisions_total" in last and "streamgroup_redis_retries_total" in last
    assert live.exit_codes == [0]
