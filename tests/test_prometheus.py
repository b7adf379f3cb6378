"""The deploy/ monitoring files against the real metrics, promtool and a real Prometheus."""

from __future__ import annotations

import json
import re
import shutil
import subprocess
import time
from pathlib import Path

import pytest

from streamgroup.serve.http import Health, start_http
from streamgroup.serve.metrics import WorkerMetrics

ROOT = Path(__file__).resolve().parent.parent
PROM = ROOT / "deploy" / "prometheus"
DASHBOARD = ROOT / "deploy" / "grafana" / "streamgroup.json"
NAME = re.compile(r"\bstreamgroup_[a-z_]+\b")


def exported_names() -> dict[str, set[str]]:
    """family name -> the sample names it exposes (``_total``, ``_bucket``...)."""
    out: dict[str, set[str]] = {}
    for fam in WorkerMetrics().registry.collect():
        suffixes = {"counter": ["_total"], "histogram": ["_bucket", "_sum", "_count"]}
        out[fam.name] = {fam.name + s for s in suffixes.get(fam.type, [""])}
    return out


def dashboard_exprs() -> list[str]:
    panels = json.loads(DASHBOARD.read_text())["panels"]
    return [t["expr"] for p in panels for t in p.get("targets", [])]


def rule_exprs() -> list[str]:
    text = (PROM / "alerts.yml").read_text()
    # Each expr is either on one line or a `|` block indented deeper than `expr:`.
    exprs = []
    for m in re.finditer(r"^(\s*)expr: (.*)$((?:\n\1\s+.*)*)", text, re.M):
        exprs.append((m.group(2).lstrip("|") + m.group(3)).strip())
    return exprs


def test_monitoring_files_name_only_real_metrics_and_cover_them_all():
    """Alerts and dashboard use existing sample names, and every metric has a panel."""
    names = exported_names()
    samples = set().union(*names.values())
    used_dash = set(NAME.findall(" ".join(dashboard_exprs())))
    used_rules = set(NAME.findall(" ".join(rule_exprs())))
    assert used_rules and used_dash
    assert used_rules <= samples, used_rules - samples
    assert used_dash <= samples, used_dash - samples
    missing = {fam for fam, s in names.items() if not s & used_dash}
    assert not missing, f"metrics without a dashboard panel: {sorted(missing)}"


def test_dashboard_json_is_generated_and_current():
    """deploy/grafana/streamgroup.json is exactly what scripts/grafana_dashboard.py writes."""
    import runpy

    gen = runpy.run_path(str(ROOT / "scripts" / "grafana_dashboard.py"))
    assert gen["main"](["--check"]) == 0
    ids = [p["id"] for p in json.loads(DASHBOARD.read_text())["panels"]]
    assert len(ids) == len(set(ids))


needs_promtool = pytest.mark.skipif(shutil.which("promtool") is None,
                                    reason="promtool not installed (Debian package prometheus)")


@needs_promtool
@pytest.mark.parametrize("args", [
    ["check", "config", "prometheus.yml"],
    ["check", "config", "prometheus-k8s.yml"],
    ["check", "rules", "alerts.yml"],
    ["test", "rules", "alerts_test.yml"],
])
def test_promtool_accepts_deploy_files(args):
    """promtool check config / check rules / test rules pass on the files in deploy/."""
    res = subprocess.run(["promtool", *args], cwd=PROM, capture_output=True, text=True,
                         timeout=60)
    assert res.returncode == 0, res.stdout + res.stderr
    assert "SUCCESS" in res.stdout + res.stderr


def drive(m: WorkerMetrics) -> None:
    """Touch every metric and label value once, the way a worker's first batches would."""
    m.answers_applied.inc(5)
    for kind in ("qid", "aid"):
        m.answers_duplicate.labels(kind=kind).inc()
    m.entries_rejected.labels(stream="answers", reason="bad_key").inc()
    m.items_added.inc(40)
    for why in ("seed", "place", "check"):
        m.questions_issued.labels(why=why).inc(3)
    m.questions_outstanding.set(6)
    m.records_unpublished.set(0)
    m.set_items({"waiting": 10, "asking": 20, "placed": 8, "unresolved": 2})
    m.spend.set(5)
    m.budget.set(1000)
    m.revisions.inc()
    m.decision_seconds.observe(12.0)
    m.batch_seconds.observe(0.01)
    m.batches.inc()
    for s in ("items", "answers"):
        m.consumer_lag.labels(stream=s).set(3)
        m.pending.labels(stream=s).set(1)
    m.noise_pooled.set(0.55)
    m.set_sources([{"source": "kiln-reader-1", "delta": 0.6, "answers": 4}])
    m.redis_retries.inc(0)
    m.ready.set(1)


@pytest.mark.slow
@pytest.mark.skipif(shutil.which("prometheus") is None,
                    reason="prometheus not installed (Debian package prometheus)")
def test_real_prometheus_scrapes_the_endpoint_and_runs_every_query():
    """A real Prometheus scrapes /metrics on loopback; values move; all our PromQL evaluates."""
    from tests.promproc import PromProc

    metrics, health = WorkerMetrics(), Health()
    drive(metrics)
    with start_http("127.0.0.1:0", metrics, health) as server:
        prom = PromProc([f"127.0.0.1:{server.port}"],
                        rule_files=[str(PROM / "alerts.yml")]).start()
        try:
            prom.wait_value("streamgroup_answers_applied_total", 5)
            metrics.answers_applied.inc(7)
            prom.wait_value("streamgroup_answers_applied_total", 12)
            prom.wait_value('streamgroup_items{status="placed"}', 8)
            prom.wait_value('up{job="streamgroup"}', 1)
            # Every panel's query is valid PromQL and finds series (a misspelt label value
            # would be valid and empty); rates need two scrapes, so poll a little.
            deadline = time.monotonic() + 30
            for expr in dashboard_exprs():
                expr = expr.replace("$instance", ".*")
                while True:
                    res = prom.query(expr)
                    assert res["status"] == "success", (expr, res)
                    if res["data"]["result"] or time.monotonic() > deadline:
                        break
                    time.sleep(0.2)
                assert res["data"]["result"], f"panel query finds nothing: {expr}"
            for expr in rule_exprs():
                assert prom.query(expr)["status"] == "success", expr
            # Every rule gets evaluated against real series, without an error.
            deadline = time.monotonic() + 30
            while True:
                rules = [r for g in prom.api("rules")["data"]["groups"] for r in g["rules"]]
                if all(r["health"] == "ok" for r in rules) or time.monotonic() > deadline:
                    break
                time.sleep(0.2)
            assert len(rules) == len(rule_exprs())
            assert all(r["health"] == "ok" for r in rules), rules
            # And one alert fires end to end: spend passes the configured budget.
            metrics.spend.set(1500)
            while time.monotonic() < deadline + 30:
                alerts = prom.api("alerts")["data"]["alerts"]
                if any(a["labels"]["alertname"] == "StreamgroupSpendOverBudget"
                       and a["state"] == "firing" for a in alerts):
                    break
                time.sleep(0.2)
            else:
                raise AssertionError(f"over-budget alert never fired: {alerts}")
        finally:
            prom.stop()


@pytest.mark.slow
@pytest.mark.redis
@pytest.mark.skipif(shutil.which("prometheus") is None,
                    reason="prometheus not installed (Debian package prometheus)")
def test_real_prometheus_scrapes_a_running_worker(redis_url):
    """Prometheus scrapes a live worker on loopback; its query API returns the run's progress."""
    pytest.importorskip("streamgroup.stream.worker")
    from tests.liveworker import LiveWorker, scrape, total
    from tests.promproc import PromProc

    with LiveWorker(redis_url, ns="promlive") as live:
        prom = PromProc([f"127.0.0.1:{live.port}"]).start()
        try:
            prom.wait_value('up{job="streamgroup"}', 1)
            prom.wait_value("streamgroup_ready", 1)
            live.client.push_items(live.crowd.keys)
            live.run_to_end()
            n = live.crowd.n
            prom.wait_value('sum(streamgroup_items{status=~"placed|unresolved"})', n)
            # The run is over: what Prometheus stores must catch up with the endpoint.
            _, final = scrape(live.url)
            applied = total(final, "streamgroup_answers_applied_total")
            assert applied > 0
            prom.wait_value("streamgroup_answers_applied_total", applied)
            prom.wait_value("sum(streamgroup_questions_issued_total)",
                            total(final, "streamgroup_questions_issued_total"))
            prom.wait_value("streamgroup_spend_answers", total(final, "streamgroup_spend_answers"))
        finally:
            prom.stop()


def test_readme_lists_every_metric():
    """The README's metrics table names every metric the worker exports (no silent drift)."""
    readme = (ROOT / "README.md").read_text(encoding="utf-8")
    missing = [fam for fam, samples in exported_names().items()
               if not any(f"`{s.removesuffix('_bucket')}`" in readme
                          or f"`{fam}`" in readme for s in samples)]
    assert not missing, f"metrics missing from README.md: {missing}"


def test_per_source_series_are_bounded():
    """Only the busiest sources get their own series; the rest fold into `other`."""
    from streamgroup.serve.metrics import TOP_SOURCES

    m = WorkerMetrics()
    rows = [{"source": f"s{i}", "delta": 0.5, "answers": 1000 - i} for i in range(200)]
    rows[-1] = {"source": "s199", "delta": -0.5, "answers": 1}
    m.set_sources(rows)
    labels = {s.labels["source"]: s.value
              for fam in m.registry.collect() if fam.name == "streamgroup_source_answers"
              for s in fam.samples}
    assert len(labels) == TOP_SOURCES + 1 and "s0" in labels and "s199" not in labels
    assert labels["other"] == sum(r["answers"] for r in rows[TOP_SOURCES:])
    m.set_sources(rows[:3])  # sources that fell away lose their series
    labels = {s.labels["source"] for fam in m.registry.collect()
              if fam.name == "streamgroup_source_bias" for s in fam.samples}
    assert labels == {"s0", "s1", "s2"}
