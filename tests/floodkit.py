"""A flood: a producer far faster than the worker writes a burst of packed answers at once.

Shared by ``tests/test_flood.py`` (1,000,000 answers) and ``scripts/fault_matrix.py``;
``scripts/flood_heavy.py`` runs bigger variants. While the worker works through the
backlog this samples, every 0.1 s: the worker's resident memory, Redis ``used_memory``,
the group's lag and pending count, and the worker's own metrics (questions outstanding).
"""

from __future__ import annotations

import os
import signal
import tempfile
import time
import urllib.request
from typing import Any

import msgpack
import numpy as np

from streamgroup.keys import GROUP, MAX_PACK_ANSWERS, Keys
from streamgroup.stream.commit import xadd_script
from tests.faultkit import Result, WorkerProc, consumed, probe, server, wait_for
from tests.redisproc import free_port

NS = "flood"
K = Keys(NS)


def _rss(pid: int) -> int:
    with open(f"/proc/{pid}/status") as f:
        for line in f:
            if line.startswith("VmRSS:"):
                return int(line.split()[1]) * 1024
    return 0


def _metric(text: str, name: str, **labels: str) -> float | None:
    want = ",".join(f'{k}="{v}"' for k, v in labels.items())
    head = f"{name}{{{want}}}" if want else name
    for line in text.splitlines():
        if line.startswith(head + " "):
            return float(line.rsplit(" ", 1)[1])
    return None


def packs(n_answers: int, n_items: int, sources: int = 40, delta: float = 0.6,
          seed: int = 5, per_entry: int = MAX_PACK_ANSWERS) -> list[dict[str, Any]]:
    """Answer entries about random pairs, each right with probability (1+δ)/2.

    ``per_entry`` answers per packed entry; 1 gives plain one-answer entries.
    """
    rng = np.random.default_rng(seed)
    side = rng.integers(0, 2, n_items)
    a = rng.integers(0, n_items, n_answers)
    b = (a + rng.integers(1, n_items, n_answers)) % n_items
    right = rng.random(n_answers) < (1 + delta) / 2
    same = (side[a] == side[b]) == right
    src = rng.integers(0, sources, n_answers)
    keys = [f"shard-{i:06d}" for i in range(n_items)]
    names = [f"flood-{s}" for s in range(sources)]
    rows = [{"a": keys[x], "b": keys[y], "same": int(s), "source": names[z]}
            for x, y, s, z in zip(a.tolist(), b.tolist(), same.tolist(), src.tolist(),
                                  strict=True)]
    if per_entry == 1:
        return rows
    return [{"pack": msgpack.packb(rows[lo:lo + per_entry], use_bin_type=True)}
            for lo in range(0, n_answers, per_entry)]


def flood(n_answers: int = 1_000_000, n_items: int = 5_000, max_outstanding: int = 40,
          inflight: int = 2, budget: int = 100, per_entry: int = MAX_PACK_ANSWERS,
          batch: int = 500, timeout: float = 180.0) -> Result:
    """Burst ``n_answers`` answers at a running worker; check memory, caps and lag."""
    how = "packed answers" if per_entry > 1 else "answers, one per entry,"
    res = Result(f"flood: {n_answers:,} {how} in one burst, producer far ahead")
    payloads = packs(n_answers, n_items, per_entry=per_entry)
    with server() as srv, tempfile.TemporaryDirectory() as tmp:
        r = probe(srv)
        port = free_port()
        w = WorkerProc(srv.url, NS, tmp, metrics_addr=f"127.0.0.1:{port}", batch=batch,
                       max_outstanding=max_outstanding, inflight=inflight, budget=budget,
                       questions_maxlen=0, snapshot_every=5)
        pipe = r.pipeline(transaction=False)
        for i in range(n_items):
            pipe.xadd(K.items, {"key": f"shard-{i:06d}"})
        pipe.execute()
        wait_for(lambda: r.hlen(K.assign) == n_items or not w.alive(), 60, "items in")
        # the first questions go out before the burst: see them reach the cap (or not)
        first_out = wait_for(lambda: (_metric(_scrape(port), "streamgroup_questions_outstanding")
                                      or 0) >= max_outstanding or not w.alive(), 10,
                             "questions to fill the outstanding cap") and \
            (_metric(_scrape(port), "streamgroup_questions_outstanding") or 0.0)
        base_rss, base_redis = _rss(w.proc.pid), int(r.info("memory")["used_memory"])
        t0 = time.monotonic()
        if per_entry > 1:
            for lo in range(0, len(payloads), 20):
                pipe = r.pipeline(transaction=False)
                for p in payloads[lo:lo + 20]:
                    pipe.xadd(K.answers, p)
                pipe.execute()
        else:  # a server-side loop, with the worker paused while it runs: a one-entry
            # producer is only ~2x faster than the worker, too close to rely on when the
            # machine is loaded, so the backlog is made certain rather than hoped for
            names = ("a", "b", "same", "source")
            os.kill(w.proc.pid, signal.SIGSTOP)
            try:
                for lo in range(0, len(payloads), 5000):
                    vals = [row[n] for row in payloads[lo:lo + 5000] for n in names]
                    r.eval(xadd_script(names), 1, K.answers, 0, *vals)
            finally:
                os.kill(w.proc.pid, signal.SIGCONT)
        write_s = time.monotonic() - t0
        peak = {"rss": 0, "redis": 0, "pending": 0, "lag": 0, "outstanding": float(first_out)}
        lag_at_end_of_burst = _lag(r) + int(r.xpending(K.answers, GROUP)["pending"])

        def sample() -> bool:
            peak["rss"] = max(peak["rss"], _rss(w.proc.pid))
            peak["redis"] = max(peak["redis"], int(r.info("memory")["used_memory"]))
            pend = int(r.xpending(K.answers, GROUP)["pending"])
            peak["pending"] = max(peak["pending"], pend)
            peak["lag"] = max(peak["lag"], _lag(r))
            out = _metric(_scrape(port), "streamgroup_questions_outstanding")
            peak["outstanding"] = max(peak["outstanding"], out or 0.0)
            return consumed(r, NS) or not w.alive()

        wait_for(sample, timeout, "the worker to work through the burst", tick=0.1)
        drain_s = time.monotonic() - t0
        alive = w.alive()
        after_redis = int(r.info("memory")["used_memory"])
        state_bytes = int(r.memory_usage(K.snapshot) or 0) + int(r.memory_usage(K.journal) or 0)
        left = r.xlen(K.answers)
        # the lag gauge must come back down too (it is read every few seconds)
        lag_gauge = wait_for(lambda: _lag_gauge(port) == 0 or not w.alive(), 15,
                             "the lag gauge to read 0") and _lag_gauge(port)
        text = _scrape(port)
        issued = sum(_metric(text, "streamgroup_questions_issued_total", why=why) or 0
                     for why in ("seed", "place", "check"))
        meta = {f.decode(): int(v) for f, v in r.hgetall(K.meta).items() if f != b"epoch"}
        q_len = r.xlen(K.questions)
        code = w.stop()
        counted = (meta.get("applied", 0) + sum(v for k, v in meta.items()
                                                if k.startswith(("dup:", "dead:"))))
        burst_bytes = sum(len(p["pack"]) for p in payloads) if per_entry > 1 else 0
        d = res.details
        d.update(answers=n_answers, producer_s=round(write_s, 2),
                 producer_answers_per_s=round(n_answers / write_s),
                 drain_s=round(drain_s, 2), worker_answers_per_s=round(n_answers / drain_s),
                 lag_entries_at_end_of_burst=lag_at_end_of_burst, peak_lag_entries=peak["lag"],
                 lag_gauge_after=lag_gauge, peak_pending_entries=peak["pending"],
                 worker_rss_growth_mb=round((peak["rss"] - base_rss) / 2 ** 20, 1),
                 worker_rss_bytes_per_answer=round((peak["rss"] - base_rss) / n_answers, 1),
                 redis_peak_growth_mb=round((peak["redis"] - base_redis) / 2 ** 20, 1),
                 redis_after_growth_mb=round((after_redis - base_redis) / 2 ** 20, 1),
                 redis_state_mb=round(state_bytes / 2 ** 20, 1), answers_left_in_stream=left,
                 burst_mb=round(burst_bytes / 2 ** 20, 1),
                 questions_issued=int(issued), questions_stream=q_len, budget=budget,
                 peak_outstanding=peak["outstanding"], max_outstanding=max_outstanding,
                 counted=counted, applied=meta.get("applied", 0), alive=alive, exit_code=code)
        checks = {
            "every answer counted once": counted == n_answers,
            # not yet acknowledged when the producer was done (undelivered + read, pending)
            "producer far ahead (backlog after burst)":
                lag_at_end_of_burst >= len(payloads) // 2,
            "lag recovered (stream and gauge)": lag_gauge == 0,
            # the worker holds at most three batches of entries: one committing, one in
            # process and the next, read just before the commit's XACK
            "reads bounded (pending <= 3 batches)": peak["pending"] <= 3 * batch,
            "worker memory per answer bounded": peak["rss"] - base_rss < 400 * n_answers,
            "input trimmed once consumed": left == 0,
            "budget respected": issued <= budget and q_len <= budget,
            "outstanding cap respected": peak["outstanding"] <= max_outstanding,
            "a cap was reached (the caps were tested)":
                peak["outstanding"] == max_outstanding or issued == budget,
            "worker alive, clean stop": alive and code == 0,
        }
        d["checks"] = checks
        res.passed = all(checks.values())
        res.outcome = (f"producer {d['producer_answers_per_s']:,}/s vs worker "
                       f"{d['worker_answers_per_s']:,}/s; backlog {lag_at_end_of_burst} entries "
                       f"back to 0 in {d['drain_s']} s; pending <= {peak['pending']} "
                       f"entries; worker +{d['worker_rss_growth_mb']} MB, Redis "
                       f"+{d['redis_after_growth_mb']} MB after (state "
                       f"{d['redis_state_mb']} MB, input stream empty); questions {int(issued)} "
                       f"<= budget {budget}, outstanding peak {int(peak['outstanding'])} <= "
                       f"{max_outstanding}"
                       + ("" if res.passed else "; FAILED: " + ", ".join(
                           k for k, v in checks.items() if not v)))
    return res


def _lag(r: Any) -> int:
    """Entries not yet delivered to the worker's group (XINFO lag, else counted from ids)."""
    for g in r.xinfo_groups(K.answers):
        if g["name"] in (GROUP, GROUP.encode()):
            if g.get("lag") is not None:
                return int(g["lag"])
            read = g.get("entries-read")
            added = r.xinfo_stream(K.answers)["entries-added"]
            return int(added) - int(read) if read is not None else -1
    return 0


def _scrape(port: int) -> str:
    with urllib.request.urlopen(f"http://127.0.0.1:{port}/metrics", timeout=5) as resp:
        return resp.read().decode()


def _lag_gauge(port: int) -> float | None:
    return _metric(_scrape(port), "streamgroup_consumer_lag_entries", stream="answers")
