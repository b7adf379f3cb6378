"""The demo: a worker, a producer and a simulated crowd on a private Redis, end to end.

Scenario (invented): an excavation yielded ceramic shards fired in one of two kilns. The
site lab asks its people and machines "were these two shards fired in the same kiln?".
Two conservators are careful, field technicians and students less so, the night shift
clicks at random and an old X-ray fluorescence scanner is miscalibrated so that it is
reliably wrong. Nobody tells the worker who is who: it learns that while it runs.

Everything goes through the wire contract, exactly as in production: the producer pushes
the shard keys to ``{NS}:items``; the crowd adapter reads ``{NS}:questions`` with its own
consumer group and writes answers (after a random delay, as a person would) to
``{NS}:answers``; progress and the summary are read back from Redis.
"""

from __future__ import annotations

import math
import sys
import threading
import time
import uuid
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any, TextIO

from .client import Client
from .core.baseline import mixed_limit
from .core.types import Question
from .embedded import EmbeddedRedis
from .errors import StreamgroupError
from .keys import Keys
from .settings import Settings
from .sim import Crowd

# (source id, bias): right with probability (1 + bias) / 2; the worker is not told.
SOURCES: tuple[tuple[str, float], ...] = (
    ("conservator-1", 0.8),
    ("conservator-2", 0.7),
    ("field-tech-1", 0.6),
    ("field-tech-2", 0.6),
    ("student-a", 0.5),
    ("student-b", 0.5),
    ("student-c", 0.4),
    ("night-shift-1", 0.0),
    ("night-shift-2", 0.0),
    ("xrf-scanner-old", -0.4),
)
ADAPTER_GROUP = "demo-crowd"
LATENCY_MS = (20, 250)  # an answer arrives this long after its question was read


@dataclass(frozen=True)
class DemoOptions:
    items: int = 2000
    alpha: float = 1e-3
    seed: int = 1
    report: str | None = None  # directory for the HTML report
    redis_url: str | None = None  # None: start a private Redis
    embedded: str = "auto"  # auto | redis-server | fakeredis
    quiet: bool = False
    inflight: int = 4  # questions in flight per item (the worker's W)
    item_ceiling: int = 200  # answers per shard before it is left to a person
    latency_ms: tuple[int, int] = LATENCY_MS
    time_limit: float = 110.0  # seconds before the demo gives up waiting
    progress_every: float = 1.0
    sources: tuple[tuple[str, float], ...] = SOURCES


@dataclass
class DemoSummary:
    items: int
    placed: int
    unresolved: int
    accuracy: float | None  # among placed items, against the hidden kilns
    wrong: int
    spend: int
    limit_per_item: float  # E[N] of the SPRT knowing every source's bias (Monte Carlo)
    seconds: float
    finished: bool
    server: str
    sources: list[dict[str, Any]] = field(default_factory=list)  # learned vs true bias
    report_path: str | None = None
    unresolved_keys: list[str] = field(default_factory=list)  # for a person to look at

    @property
    def ok(self) -> bool:
        return self.finished

    @property
    def spend_per_item(self) -> float:
        return self.spend / max(self.items, 1)


def _counts(st: dict[str, Any]) -> dict[str, int]:
    return {k: int(v or 0) for k, v in st["items"].items()}


class _Progress:
    """Prints one line per interval (to stderr, so a summary on stdout stays clean)."""

    def __init__(self, out: TextIO, quiet: bool, every: float) -> None:
        self.out, self.quiet, self.every = out, quiet, every
        self.last = 0.0

    def maybe(self, t: float, line: Callable[[], str]) -> None:
        if not self.quiet and t - self.last >= self.every:
            self.last = t
            print(line(), file=self.out, flush=True)


def _progress_line(elapsed: float, st: dict[str, Any], n: int) -> str:
    c = _counts(st)
    ranked = sorted((s for s in st["sources"] if s.get("answers")),
                    key=lambda s: -float(s.get("delta", 0.0)))
    shown = ranked[:2] + ranked[-1:] if len(ranked) > 3 else ranked
    noise = ", ".join(f"{s['source']} {float(s.get('delta', math.nan)):+.2f}" for s in shown)
    return (f"[{elapsed:5.1f}s] placed {c['placed']}/{n}, asking {c['asking']}, "
            f"waiting {c['waiting']}, unresolved {c['unresolved']}, "
            f"spend {st['spend'] or 0}" + (f"; learned bias {noise}" if noise else ""))


def _worker_thread(settings: Settings) -> tuple[Any, threading.Thread, dict[str, Any]]:
    from .stream.worker import Worker

    worker = Worker(settings)
    result: dict[str, Any] = {}

    def target() -> None:
        try:
            result["code"] = worker.run()
        except BaseException as exc:  # noqa: BLE001 - re-raised in the main thread
            result["error"] = exc

    thread = threading.Thread(target=target, name="streamgroup-worker", daemon=True)
    thread.start()
    return worker, thread, result


def _crowd_step(client: Client, crowd: Crowd, now_ms: int) -> int:
    """Read new questions (queued with a latency), send the answers that are due."""
    batch = client.read_questions(ADAPTER_GROUP, "crowd-1", count=5000, block_ms=20)
    questions = [Question(q["qid"], q["a"], q["b"], q["why"], int(q["ts"] or 0))
                 for _eid, qs in batch for q in qs]
    if questions:
        crowd.ask(questions, now_ms)
    due = crowd.due(now_ms)
    if due:
        client.push_answers(due, packed=True)
    # The answers are queued in the simulated crowd's memory; a real adapter would ack
    # only after writing them. Here a lost question is re-issued after the timeout.
    client.ack_questions(ADAPTER_GROUP, [eid for eid, _ in batch])
    return len(due)


def _summarise(client: Client, crowd: Crowd, opts: DemoOptions, seconds: float,
               finished: bool, server: str,
               engine_sources: list[dict[str, Any]] | None = None) -> DemoSummary:
    truth = {k: crowd.side_of(k) for k in crowd.keys}
    records = [r for r in client.assignments() if r["key"] in truth]
    placed = [(r["key"], r["side"]) for r in records if r["status"] == "placed"]
    unresolved = sorted(r["key"] for r in records if r["status"] == "unresolved")
    # The worker names the sides "0" and "1" (the first reference item is "0"); the demo
    # knows the kilns, so it reads the labels the way that matches best.
    agree = sum(1 for k, s in placed if str(truth[k]) == str(s))
    best = max(agree, len(placed) - agree)
    st = client.status()
    counts = _counts(st)
    true_bias = dict(opts.sources)
    sources = [{"source": s["source"], "learned": float(s.get("delta", math.nan)),
                "true": true_bias.get(s["source"]), "answers": int(s.get("answers", 0))}
               for s in (st["sources"] or engine_sources or [])]
    limit = mixed_limit([d for _, d in opts.sources], opts.alpha, walks=20_000,
                        seed=opts.seed).mean_length
    return DemoSummary(
        items=opts.items, placed=counts["placed"], unresolved=counts["unresolved"],
        accuracy=best / len(placed) if placed else None, wrong=len(placed) - best,
        spend=int(st["spend"] or 0), limit_per_item=limit, seconds=seconds,
        finished=finished, server=server, sources=sources, unresolved_keys=unresolved)


def error_upper_bound(wrong: int, n: int, confidence: float = 0.95) -> float:
    """Clopper-Pearson upper bound (two-sided interval) on an error rate, by bisection.

    The p at which P(X <= wrong; n, p) = (1 - confidence) / 2 (Clopper and Pearson, 1934);
    a test checks it against scipy.stats.beta.ppf.
    """
    if n <= 0:
        return 1.0
    if wrong >= n:
        return 1.0
    tail = (1.0 - confidence) / 2.0

    def cdf(p: float) -> float:
        logp, logq = math.log(p), math.log1p(-p)
        return sum(math.exp(math.lgamma(n + 1) - math.lgamma(i + 1) - math.lgamma(n - i + 1)
                            + i * logp + (n - i) * logq) for i in range(wrong + 1))

    lo, hi = 0.0, 1.0
    for _ in range(60):
        mid = (lo + hi) / 2.0
        if cdf(mid) > tail:
            lo = mid
        else:
            hi = mid
    return hi


def render_summary(s: DemoSummary, alpha: float) -> str:
    lines = [f"demo summary ({s.items} shards, alpha {alpha:g}, {s.seconds:.1f} s, {s.server})"]
    if not s.finished:
        lines.append("  stopped before every shard was decided (time limit or interrupted)")
    acc = "n/a" if s.accuracy is None else f"{100 * s.accuracy:.2f}%"
    lines.append(f"  placed {s.placed}, unresolved {s.unresolved} (for a person to look at)")
    if s.unresolved_keys:
        more = len(s.unresolved_keys) - 5
        lines.append("    unresolved: " + ", ".join(s.unresolved_keys[:5])
                     + (f" and {more} more (streamgroup export --status unresolved)"
                        if more > 0 else ""))
    lines.append(f"  accuracy against the hidden kilns: {acc}: {s.wrong} wrong of {s.placed} "
                 f"(alpha expects about {alpha * s.placed:.1f}; 95% upper bound on the "
                 f"error rate {100 * error_upper_bound(s.wrong, s.placed):.2f}% vs alpha "
                 f"{100 * alpha:g}%)")
    ratio = s.spend_per_item / s.limit_per_item if s.limit_per_item else math.nan
    lines.append(f"  spend: {s.spend} answers = {s.spend_per_item:.1f} per shard; the "
                 f"per-item limit (every source's bias known, perfect reference) is "
                 f"{s.limit_per_item:.1f}: ratio {ratio:.2f}")
    known = [x for x in s.sources if x["answers"] > 0]
    if known:
        ranked = sorted(known, key=lambda x: -x["learned"])
        lines.append("  learned bias (1 = always right, 0 = random, < 0 = reliably wrong):")
        for tag, rows in (("most reliable", ranked[:3]), ("least reliable", ranked[-3:])):
            body = "; ".join(f"{x['source']} {x['learned']:+.2f} (true "
                             f"{x['true']:+.1f}, {x['answers']} answers)" for x in rows)
            lines.append(f"    {tag}: {body}")
    if s.report_path:
        lines.append(f"  report: {s.report_path}")
    return "\n".join(lines)


def run_demo(opts: DemoOptions, out: TextIO | None = None, err: TextIO | None = None,
             stop: threading.Event | None = None) -> DemoSummary:
    """Run the whole loop and print progress (``err``) and the summary (``out``).

    Setting ``stop`` (the command line does on SIGINT/SIGTERM) ends the run early: the
    worker commits what it holds, the summary covers what was decided, the server goes.
    """
    stop = stop if stop is not None else threading.Event()
    out = out if out is not None else sys.stdout
    err = err if err is not None else sys.stderr
    started = time.monotonic()
    embedded: EmbeddedRedis | None = None
    if opts.redis_url is None:
        embedded = EmbeddedRedis(opts.embedded).start()  # type: ignore[arg-type]
        url, ns, server = embedded.url, "demo", f"private {embedded.kind} on {embedded.url}"
    else:
        # Someone's own Redis: a fresh namespace, removed at the end.
        url, ns, server = opts.redis_url, f"demo-{uuid.uuid4().hex[:8]}", "your Redis"
    client = Client(url, ns)
    worker = thread = None
    try:
        client.redis.ping()
        if not opts.quiet:
            print(f"streamgroup demo: {opts.items} shards, {len(opts.sources)} sources, "
                  f"alpha {opts.alpha:g}, seed {opts.seed}; {server}, namespace {ns}",
                  file=err, flush=True)
        settings = Settings(redis=url, ns=ns, alpha=opts.alpha, seed=opts.seed,
                            inflight=opts.inflight, item_ceiling=opts.item_ceiling,
                            metrics_addr="", consumer="demo-worker", block_ms=20,
                            pack_questions=True, log_level="warning",
                            question_timeout=30.0, history_every=0.5)
        crowd = Crowd(opts.items, sources=[d for _, d in opts.sources], seed=opts.seed,
                      latency_ms=opts.latency_ms)
        crowd.source_names = [name for name, _ in opts.sources]
        client.ensure_group(ADAPTER_GROUP)
        client.push_items(crowd.keys)
        worker, thread, result = _worker_thread(settings)
        progress = _Progress(err, opts.quiet, opts.progress_every)
        finished = False
        next_check = 0.0
        while True:
            elapsed = time.monotonic() - started
            _crowd_step(client, crowd, int(elapsed * 1000))
            if "error" in result or not thread.is_alive():
                break
            if elapsed >= next_check:
                next_check = elapsed + 0.25
                st = client.status()
                c = _counts(st)
                finished = c["placed"] + c["unresolved"] >= opts.items
                if finished:
                    progress.last = -math.inf  # always show the final state
                progress.maybe(elapsed, lambda st=st, e=elapsed: _progress_line(
                    e, st, opts.items))
                if finished:
                    break
            if elapsed > opts.time_limit or stop.is_set():
                break
        worker.request_stop()
        thread.join(30)
        if "error" in result:
            raise result["error"]
        if thread.is_alive():
            raise StreamgroupError("the demo worker did not stop within 30 s")
        # The worker thread has ended, so its engine can be read safely (a fallback for
        # a worker that does not publish {NS}:noise).
        learned = worker.state.engine.sources() if worker.state is not None else []
        summary = _summarise(client, crowd, opts, time.monotonic() - started, finished,
                             server, learned)
        if opts.report:
            from .report import build_report

            summary.report_path = build_report(url, ns, opts.report, alpha=opts.alpha)
        print(render_summary(summary, opts.alpha), file=out, flush=True)
        return summary
    finally:
        if worker is not None and thread is not None and thread.is_alive():
            worker.request_stop()
            thread.join(10)
        if opts.redis_url is not None:
            client.redis.delete(*Keys(ns).all())
        client.close()
        if embedded is not None:
            embedded.stop()


def summary_dict(s: DemoSummary) -> dict[str, Any]:
    """The summary as plain values (for tests and scripts)."""
    return {"items": s.items, "placed": s.placed, "unresolved": s.unresolved,
            "accuracy": s.accuracy, "wrong": s.wrong, "spend": s.spend,
            "spend_per_item": s.spend_per_item, "limit_per_item": s.limit_per_item,
            "ratio": s.spend_per_item / s.limit_per_item if s.limit_per_item else math.nan,
            "seconds": s.seconds, "finished": s.finished, "sources": s.sources,
            "server": s.server}
