"""What the worker reports after each batch: metrics, health beats and progress samples.

Nothing here is replayed state: counters move by what each committed batch did, gauges
are refreshed from the engine at most every ``GAUGES_EVERY`` seconds (``stats()`` walks
every item), lag and pending come from ``XINFO GROUPS`` every ``GROUP_INFO_EVERY``
seconds, and a progress sample goes to ``{NS}:history`` every ``history_every`` seconds.
"""

from __future__ import annotations

import time
from typing import Any

import msgpack
import redis

from ..keys import GROUP, WHYS, Keys
from ..serve.metrics import WorkerMetrics
from ..settings import Settings
from .batch import Outcome
from .state import WorkerState

GAUGES_EVERY = 0.5  # seconds between refreshes of engine-derived gauges
GROUP_INFO_EVERY = 5.0  # seconds between XINFO GROUPS reads (lag and pending gauges)
DUPLICATE_KINDS = ("qid", "aid", "pair_source", "item")


class Progress:
    """Metrics and progress of one worker; ``metrics`` and ``health`` may be None."""

    def __init__(self, settings: Settings, keys: Keys, history_cap: int) -> None:
        self.settings = settings
        self.keys = keys
        self.history_cap = history_cap
        self.metrics: WorkerMetrics | None = None
        self.health: Any = None
        self._next_gauges = 0.0
        self._next_group_info = 0.0
        self._next_history = 0.0
        self._revisions_seen = 0

    def reset(self, state: WorkerState) -> None:
        """After a (re)load: revisions already counted are not counted again."""
        self._revisions_seen = int(state.engine.stats()["revisions"])

    def batch_done(self, out: Outcome, seconds: float, now: float, state: WorkerState | None,
                   client: redis.Redis | None, redis_seconds: float | None = None,
                   read_count: int | None = None) -> None:
        m = self.metrics
        if m is not None:
            c = out.counts
            m.batches.inc()
            m.batch_seconds.observe(seconds)
            if redis_seconds is not None:
                m.commit_redis_seconds.observe(redis_seconds)
            if read_count is not None:
                m.read_count.set(read_count)
            if c["applied"]:
                m.answers_applied.inc(c["applied"])
            if c["items_applied"]:
                m.items_added.inc(c["items_applied"])
            for kind in DUPLICATE_KINDS:
                if c["dup:" + kind]:
                    m.answers_duplicate.labels(kind=kind).inc(c["dup:" + kind])
            for stream, d in out.dead:
                m.entries_rejected.labels(stream=stream.rsplit(":", 1)[-1],
                                          reason=d.kind).inc()
            whys = out.questions.why
            for why in WHYS if whys else ():  # (a count per kind: no hashing per question)
                k = whys.count(why)
                if k:
                    m.questions_issued.labels(why=why).inc(k)
            take = getattr(state.engine, "take_latencies", None) if state else None
            if take is not None:
                for sec in take():
                    m.decision_seconds.observe(sec)
        self.periodic(now, state, client)

    def periodic(self, now: float, state: WorkerState | None,
                 client: redis.Redis | None) -> None:
        if self.health is not None:
            self.health.beat()
        if state is None or client is None:
            return
        self.refresh_gauges(state)
        if now >= self._next_history:
            self._next_history = now + self.settings.history_every
            self._write_history(now, state, client)
        if self.metrics is not None and now >= self._next_group_info:
            self._next_group_info = now + GROUP_INFO_EVERY
            self._group_info(client)

    def refresh_gauges(self, state: WorkerState, force: bool = False) -> None:
        m = self.metrics
        if m is None:
            return
        t = time.monotonic()
        if not force and t < self._next_gauges:
            return
        self._next_gauges = t + GAUGES_EVERY
        st = state.engine.stats()
        m.set_items(st["items"])
        m.spend.set(st["spend"])
        m.questions_outstanding.set(st["outstanding"])
        m.records_unpublished.set(state.engine.unpublished())
        m.noise_pooled.set(st["pooled_delta"])
        rev = int(st["revisions"])
        if rev > self._revisions_seen:
            m.revisions.inc(rev - self._revisions_seen)
        self._revisions_seen = rev
        m.set_sources(state.engine.sources())

    def _write_history(self, now: float, state: WorkerState, client: redis.Redis) -> None:
        st = state.engine.stats()
        items = st["items"]
        pipe = client.pipeline(transaction=False)
        pipe.xadd(self.keys.history, {
            "ts": int(now * 1000), "placed": items.get("placed", 0),
            "asking": items.get("asking", 0), "waiting": items.get("waiting", 0),
            "unresolved": items.get("unresolved", 0), "spend": st["spend"],
            "outstanding": st["outstanding"]}, maxlen=self.history_cap, approximate=True)
        # The learned noise for `status`, the demo and the report (msgpack map per source),
        # refreshed with each progress sample; like the sample itself it may be one batch
        # ahead of the last commit, which is fine for a summary nobody replays.
        noise = {s["source"]: msgpack.packb({"delta": s["delta"], "se": s["se"],
                                             "answers": s["answers"]})
                 for s in state.engine.sources() if s["answers"]}
        if noise:
            pipe.hset(self.keys.noise, mapping=noise)
        pipe.execute()

    def _group_info(self, client: redis.Redis) -> None:
        assert self.metrics is not None
        for stream, label in ((self.keys.items, "items"), (self.keys.answers, "answers")):
            for g in client.xinfo_groups(stream):
                if g.get("name") in (GROUP.encode(), GROUP):
                    lag, pending = g.get("lag"), int(g.get("pending", 0))
                    if lag is None:
                        # Redis cannot count it after entries were deleted (XDEL) past the
                        # group's position; the input is trimmed below the oldest pending
                        # entry, so XLEN - pending bounds it from above (a stale gauge
                        # would keep a lag alert firing, or silent, for good).
                        lag = max(0, int(client.xlen(stream)) - pending)
                    self.metrics.consumer_lag.labels(stream=label).set(int(lag))
                    self.metrics.pending.labels(stream=label).set(pending)
