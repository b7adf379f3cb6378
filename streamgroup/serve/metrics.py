"""Every Prometheus metric of the worker, declared in one place.

Build one :class:`WorkerMetrics` per process (tests pass a fresh ``CollectorRegistry``).
Label values come from small fixed sets; per-source series are bounded (top sources by
volume, the rest folded into ``source="other"``).
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping

from prometheus_client import CollectorRegistry, Counter, Gauge, Histogram

PREFIX = "streamgroup_"
TOP_SOURCES = 20  # per-source series exported; the rest are aggregated as "other"

REJECT_REASONS = (
    "malformed", "bad_key", "bad_value", "unknown_qid", "bad_pack", "too_large", "engine",
)
DUPLICATE_KINDS = ("qid", "aid", "pair_source", "item")


class WorkerMetrics:
    def __init__(self, registry: CollectorRegistry | None = None) -> None:
        r = registry if registry is not None else CollectorRegistry()
        self.registry = r
        p = PREFIX
        self.answers_applied = Counter(p + "answers_applied", "Answers counted as evidence.",
                                       registry=r)
        self.answers_duplicate = Counter(p + "answers_duplicate", "Answers recognised as "
                                         "repeats and not counted.", ["kind"], registry=r)
        self.entries_rejected = Counter(p + "entries_rejected", "Entries sent to the dead-"
                                        "letter stream.", ["stream", "reason"], registry=r)
        self.items_added = Counter(p + "items_added", "Items registered.", registry=r)
        self.questions_issued = Counter(p + "questions_issued", "Questions written.", ["why"],
                                        registry=r)
        self.questions_outstanding = Gauge(p + "questions_outstanding", "Questions in flight.",
                                           registry=r)
        self.items = Gauge(p + "items", "Items by status.", ["status"], registry=r)
        self.spend = Gauge(p + "spend_answers", "Answers counted so far (the spend).",
                           registry=r)
        self.budget = Gauge(p + "budget_answers", "Configured spend budget in answers "
                            "(0 = unlimited); set once at start-up.", registry=r)
        self.revisions = Counter(p + "revisions", "Commits overturned by later answers.",
                                 registry=r)
        self.decision_seconds = Histogram(
            p + "decision_seconds", "Time from an item's first question to its commit.",
            buckets=(1, 5, 15, 60, 300, 900, 3600, 4 * 3600, 24 * 3600, float("inf")),
            registry=r)
        self.batch_seconds = Histogram(
            p + "batch_seconds", "Time to process and commit one batch.",
            buckets=(0.001, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1, 2.5, 5, float("inf")),
            registry=r)
        self.batches = Counter(p + "batches", "Batches committed.", registry=r)
        self.commit_redis_seconds = Histogram(
            p + "commit_redis_seconds", "Redis's own time inside one batch transaction "
            "(lookups wait behind it; snapshot batches not included).",
            buckets=(0.0001, 0.00025, 0.0005, 0.00075, 0.001, 0.0015, 0.002, 0.003, 0.005,
                     0.01, float("inf")), registry=r)
        self.records_unpublished = Gauge(
            p + "records_unpublished", "Changed assignment records waiting for the next "
            "batches (a wave of decisions after the sources are re-learnt goes out over "
            "several batches).", registry=r)
        self.read_count = Gauge(p + "read_entries", "Entries the worker asks for per read "
                                "(sized so that a transaction takes about hold_ms).",
                                registry=r)
        self.consumer_lag = Gauge(p + "consumer_lag_entries", "Entries not yet delivered to "
                                  "the worker's group.", ["stream"], registry=r)
        self.pending = Gauge(p + "pending_entries", "Entries delivered but not acknowledged.",
                             ["stream"], registry=r)
        self.noise_pooled = Gauge(p + "noise_pooled_bias", "Learned bias of all sources "
                                  "pooled (1 = always right, 0 = random).", registry=r)
        self.source_bias = Gauge(p + "source_bias", "Learned bias per source (top by volume).",
                                 ["source"], registry=r)
        self.source_answers = Gauge(p + "source_answers", "Answers counted per source (top "
                                    "by volume).", ["source"], registry=r)
        self.redis_retries = Counter(p + "redis_retries", "Reconnects after a lost "
                                     "connection.", registry=r)
        self.ready = Gauge(p + "ready", "1 when the worker has loaded its state and reads.",
                           registry=r)
        self._source_labels: set[str] = set()

    def set_items(self, counts: Mapping[str, int]) -> None:
        for status, n in counts.items():
            self.items.labels(status=status).set(n)

    def set_sources(self, sources: Iterable[Mapping[str, object]]) -> None:
        """Export the top sources by volume; fold the rest into ``other``."""
        rows = sorted(sources, key=lambda s: -int(s["answers"]))  # type: ignore[call-overload]
        top, rest = rows[:TOP_SOURCES], rows[TOP_SOURCES:]
        seen: set[str] = set()
        for s in top:
            name = str(s["source"]) or "anonymous"
            seen.add(name)
            self.source_bias.labels(source=name).set(float(s["delta"]))  # type: ignore[arg-type]
            self.source_answers.labels(source=name).set(int(s["answers"]))  # type: ignore[call-overload]
        if rest:
            total = sum(int(s["answers"]) for s in rest)  # type: ignore[call-overload]
            mean = sum(float(s["delta"]) * int(s["answers"]) for s in rest) / max(total, 1)  # type: ignore[arg-type, call-overload]
            seen.add("other")
            self.source_bias.labels(source="other").set(mean)
            self.source_answers.labels(source="other").set(total)
        for gone in self._source_labels - seen:
            self.source_bias.remove(gone)
            self.source_answers.remove(gone)
        self._source_labels = seen
