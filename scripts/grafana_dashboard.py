#!/usr/bin/env python3
"""Write deploy/grafana/streamgroup.json, the Grafana dashboard for the worker's metrics.

The dashboard is generated rather than hand-edited so every query is written once here and
a test can check that each metric it names exists in streamgroup/serve/metrics.py and
that the committed JSON is what this script produces. Usage:

    python scripts/grafana_dashboard.py            # rewrite the file
    python scripts/grafana_dashboard.py --check    # exit 1 if the file is stale
"""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path
from typing import Any

OUT = Path(__file__).resolve().parent.parent / "deploy" / "grafana" / "streamgroup.json"
DS = {"type": "prometheus", "uid": "${datasource}"}
SEL = 'job="streamgroup", instance=~"$instance"'


def _targets(queries: list[tuple[str, str]]) -> list[dict[str, Any]]:
    return [{"datasource": DS, "expr": expr, "legendFormat": legend, "refId": chr(65 + i)}
            for i, (expr, legend) in enumerate(queries)]


class Layout:
    """Places panels left to right on Grafana's 24-column grid."""

    def __init__(self) -> None:
        self.panels: list[dict[str, Any]] = []
        self.x = 0
        self.y = 0
        self.row_h = 0

    def row(self, title: str) -> None:
        self.y += self.row_h
        self.x, self.row_h = 0, 0
        self.panels.append({"type": "row", "title": title, "collapsed": False,
                            "id": len(self.panels) + 1,
                            "gridPos": {"h": 1, "w": 24, "x": 0, "y": self.y}, "panels": []})
        self.y += 1

    def add(self, kind: str, title: str, queries: list[tuple[str, str]], *, w: int = 8,
            h: int = 8, unit: str = "short", desc: str = "", stack: bool = False,
            extra: dict[str, Any] | None = None) -> None:
        if self.x + w > 24:
            self.y += self.row_h
            self.x, self.row_h = 0, 0
        defaults: dict[str, Any] = {"unit": unit}
        if kind == "timeseries":
            defaults["custom"] = {"lineWidth": 2, "fillOpacity": 20 if stack else 0,
                                  "stacking": {"mode": "normal" if stack else "none"}}
        panel = {"type": kind, "title": title, "description": desc, "id": len(self.panels) + 1,
                 "datasource": DS, "gridPos": {"h": h, "w": w, "x": self.x, "y": self.y},
                 "targets": _targets(queries),
                 "fieldConfig": {"defaults": defaults, "overrides": []},
                 "options": {"legend": {"displayMode": "list", "placement": "bottom"}}
                 if kind == "timeseries" else {"reduceOptions": {"calcs": ["lastNotNull"]}}}
        panel.update(extra or {})
        self.panels.append(panel)
        self.x += w
        self.row_h = max(self.row_h, h)


def q(expr: str) -> str:
    return expr.replace("SEL", SEL)


def dashboard() -> dict[str, Any]:
    g = Layout()
    g.row("Progress and spend")
    for title, expr, unit in [
        ("Placed", 'sum(streamgroup_items{SEL, status="placed"})', "short"),
        ("Pending", 'sum(streamgroup_items{SEL, status=~"asking|waiting"})', "short"),
        ("Unresolved", 'sum(streamgroup_items{SEL, status="unresolved"})', "short"),
        ("Spend (answers)", "sum(streamgroup_spend_answers{SEL})", "short"),
        ("Questions outstanding", "sum(streamgroup_questions_outstanding{SEL})", "short"),
        ("Ready workers", "sum(streamgroup_ready{SEL})", "short"),
    ]:
        g.add("stat", title, [(q(expr), title)], w=4, h=4, unit=unit)
    g.add("timeseries", "Items by status", [(q("sum by (status) (streamgroup_items{SEL})"),
                                             "{{status}}")], stack=True,
          desc="Items known to the worker, by status; unresolved items need a person.")
    g.add("timeseries", "Spend against budget", [
        (q("sum(streamgroup_spend_answers{SEL})"), "spend"),
        (q("sum(streamgroup_budget_answers{SEL}) > 0"), "budget")],
        desc="Answers counted so far; the budget line shows only when one is configured.")
    g.add("timeseries", "Answers per second", [
        (q("sum(rate(streamgroup_answers_applied_total{SEL}[5m]))"), "applied"),
        (q("sum by (kind) (rate(streamgroup_answers_duplicate_total{SEL}[5m]))"),
         "duplicate ({{kind}})"),
        (q("sum by (reason) (rate(streamgroup_entries_rejected_total{SEL}[5m]))"),
         "rejected ({{reason}})")], unit="ops")
    g.add("timeseries", "Questions issued per second, by purpose", [
        (q("sum by (why) (rate(streamgroup_questions_issued_total{SEL}[5m]))"), "{{why}}")],
        unit="ops", stack=True)
    g.add("timeseries", "Questions outstanding", [
        (q("sum(streamgroup_questions_outstanding{SEL})"), "outstanding")])
    g.add("timeseries", "Items added and revisions per hour", [
        (q("sum(increase(streamgroup_items_added_total{SEL}[1h]))"), "items added"),
        (q("sum(increase(streamgroup_revisions_total{SEL}[1h]))"), "revisions")],
        desc="A revision is a commit overturned by later answers.")

    g.row("Latency")
    g.add("timeseries", "Time from first question to commit", [
        (q(f"histogram_quantile({p}, sum by (le) "
           "(rate(streamgroup_decision_seconds_bucket{SEL}[15m])))"), f"p{int(p * 100)}")
        for p in (0.5, 0.9, 0.99)], w=12, unit="s")
    g.add("timeseries", "Batch processing time", [
        (q(f"histogram_quantile({p}, sum by (le) "
           "(rate(streamgroup_batch_seconds_bucket{SEL}[5m])))"), f"p{int(p * 100)}")
        for p in (0.5, 0.99)] + [
        (q("sum(rate(streamgroup_batches_total{SEL}[5m]))"), "batches/s")], w=12, unit="s",
        extra={"fieldConfig": {"defaults": {"unit": "s"}, "overrides": [{
            "matcher": {"id": "byName", "options": "batches/s"},
            "properties": [{"id": "unit", "value": "ops"},
                           {"id": "custom.axisPlacement", "value": "right"}]}]}})

    g.add("timeseries", "Redis time per batch transaction", [
        (q(f"histogram_quantile({p}, sum by (le) "
           "(rate(streamgroup_commit_redis_seconds_bucket{SEL}[5m])))"), f"p{int(p * 100)}")
        for p in (0.5, 0.99)] + [
        (q("avg(streamgroup_read_entries{SEL})"), "entries per read")], w=12, unit="s",
        desc="Redis's own time inside one batch's MULTI/EXEC (a lookup waits behind it), "
             "and the entries each read asks for, sized to keep it near hold_ms.",
        extra={"fieldConfig": {"defaults": {"unit": "s"}, "overrides": [{
            "matcher": {"id": "byName", "options": "entries per read"},
            "properties": [{"id": "unit", "value": "short"},
                           {"id": "custom.axisPlacement", "value": "right"}]}]}})
    g.add("timeseries", "Records waiting to be published", [
        (q("max(streamgroup_records_unpublished{SEL})"), "records")], w=12, unit="short",
        desc="Changed assignment records the next batches will publish: a wave of "
             "decisions after the sources are re-learnt goes out over several batches, "
             "so that no transaction holds Redis long. Above zero for more than a few "
             "seconds means the worker is not keeping up.")

    g.row("Streams and Redis")
    g.add("timeseries", "Consumer lag", [
        (q("sum by (stream) (streamgroup_consumer_lag_entries{SEL})"), "{{stream}}")],
        desc="Entries not yet delivered to the worker's consumer group.")
    g.add("timeseries", "Pending entries", [
        (q("sum by (stream) (streamgroup_pending_entries{SEL})"), "{{stream}}")],
        desc="Delivered but not yet acknowledged (a batch in hand, or a crashed consumer's).")
    g.add("timeseries", "Redis reconnects", [
        (q("sum(increase(streamgroup_redis_retries_total{SEL}[5m]))"), "reconnects / 5m")])

    g.row("Learned noise")
    g.add("timeseries", "Pooled bias", [(q("avg(streamgroup_noise_pooled_bias{SEL})"),
                                          "pooled δ")], unit="none",
          desc="1 = always right, 0 = random clicking.",
          extra={"fieldConfig": {"defaults": {"unit": "none", "min": -1, "max": 1},
                                 "overrides": []}})
    g.add("timeseries", "Bias per source (top by volume)", [
        (q("avg by (source) (streamgroup_source_bias{SEL})"), "{{source}}")], unit="none",
        desc="Negative: a source that is reliably wrong (its answers count flipped).",
        extra={"fieldConfig": {"defaults": {"unit": "none", "min": -1, "max": 1},
                               "overrides": []}})
    g.add("bargauge", "Answers per source", [
        (q("sort_desc(sum by (source) (streamgroup_source_answers{SEL}))"), "{{source}}")],
        extra={"options": {"orientation": "horizontal", "displayMode": "basic",
                           "reduceOptions": {"calcs": ["lastNotNull"]}}})

    return {
        "title": "streamgroup worker",
        "uid": "streamgroup-worker",
        "description": "Progress, spend, latency, stream health and learned noise of "
                       "streamgroup workers (metrics from streamgroup/serve/metrics.py).",
        "tags": ["streamgroup"],
        "timezone": "utc",
        "refresh": "30s",
        "schemaVersion": 39,
        "version": 1,
        "editable": True,
        "graphTooltip": 1,
        "time": {"from": "now-6h", "to": "now"},
        "templating": {"list": [
            {"name": "datasource", "type": "datasource", "query": "prometheus",
             "label": "Data source", "current": {}, "hide": 0},
            {"name": "instance", "type": "query", "datasource": DS, "label": "Worker",
             "query": {"query": 'label_values(streamgroup_ready{job="streamgroup"}, instance)',
                       "refId": "instances"},
             "definition": 'label_values(streamgroup_ready{job="streamgroup"}, instance)',
             "includeAll": True, "multi": True, "allValue": ".*", "refresh": 2,
             "current": {}, "hide": 0},
        ]},
        "annotations": {"list": []},
        "panels": g.panels,
    }


def render() -> str:
    return json.dumps(dashboard(), indent=2, ensure_ascii=False) + "\n"


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--check", action="store_true", help="fail if the committed file is stale")
    args = ap.parse_args(argv)
    text = render()
    if args.check:
        if not OUT.exists() or OUT.read_text(encoding="utf-8") != text:
            print(f"{OUT} is stale: run python scripts/grafana_dashboard.py", file=sys.stderr)
            return 1
        return 0
    OUT.parent.mkdir(parents=True, exist_ok=True)
    OUT.write_text(text, encoding="utf-8")
    print(OUT)
    return 0


if __name__ == "__main__":
    sys.exit(main())
