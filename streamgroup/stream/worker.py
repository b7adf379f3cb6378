"""The worker: one short loop of read batch -> process purely -> commit in one MULTI/EXEC.

Reading order after every (re)start: this consumer's own pending entries first (id ``0``),
then entries left idle by other consumers (XAUTOCLAIM, also re-checked every
``claim_idle`` seconds), then new entries (``>``). A crash or a lost connection before EXEC
leaves the batch pending, so it is applied exactly once later; after a lost connection the
in-memory state is thrown away and reloaded from Redis, because the worker cannot know
whether the last EXEC took effect.

Overlap: batch k's transaction is sent after batch k+1 has been read and its reply is read
after batch k+1 has been processed, so Redis executes one while Python computes the other
(see ``_turn``). Batches stay bounded: at most ``batch`` entries per stream and at most
``max(batch, BATCH_ANSWERS)`` answers (big packs read together wait in a local backlog).
Each read asks for as many entries as keep a batch's transaction near ``hold_ms`` of
Redis's own time (``sizing.ReadSizer``, fed from the transactions' ``TIME`` replies).
State: every committed batch appends one journal entry; every ``snapshot_every`` seconds,
or as soon as the journal has outgrown the last snapshot, the batch's transaction writes a
fresh snapshot and drops the journal instead.

Exit codes of :meth:`Worker.run`: 0 after a requested stop, 1 after an unexpected error
(logged with its traceback), 3 when the state in Redis is inconsistent (StateError), 4
when another worker took the namespace's lease (``lease.py``).
"""

from __future__ import annotations

import contextlib
import ctypes
import gc
import operator
import os
import random
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any

import redis
import structlog

from ..errors import StateError
from ..keys import GROUP, Keys
from ..serve.metrics import WorkerMetrics
from ..settings import Settings
from . import lease, recovery
from .batch import Outcome, process
from .codec import pack_answer_count
from .commit import Caps, CommitError, CommitPlan, build_commit, execute, receive, send
from .progress import Progress
from .sizing import ReadSizer
from .state import WorkerState

EXIT_OK, EXIT_ERROR, EXIT_STATE, EXIT_LEASE = 0, 1, 3, 4
BACKOFF_BASE = 0.1  # seconds; doubled per failed attempt, jittered, capped
BACKOFF_CAP = 5.0
IDLE_PLAN_EVERY = 1.0  # seconds between plan() calls while no entries arrive
JOURNAL_FLOOR = 32 << 20  # bytes of journal always allowed before an early snapshot
BATCH_ANSWERS = 20_000  # answers in one batch at most (unless `batch` is larger); packed
# entries beyond it wait, already read, for the next batches
GC_YOUNG = 50_000  # container allocations between young collections (CPython's default: 700)


def tune_gc() -> None:
    """Set the cyclic garbage collector for a process that runs a worker.

    A batch allocates thousands of containers that live until the batch is done (the lists
    of a read's reply, tuples, columns) and creates no cycles on its way; with CPython's
    default threshold the collector runs several times per batch and walks them, and they
    pile up into older generations that it walks again. A larger young generation lets
    reference counting free the batch first (common practice for long-lived Python
    services); cycles are still collected, only less often. Measured under callgrind: the
    collector's share of the in-process path's instructions fell from 5.0% to 1.6%.
    """
    gc.set_threshold(GC_YOUNG, 10, 10)


# mallopt parameters (glibc's malloc.h)
_M_TRIM_THRESHOLD = -1
_M_MMAP_MAX = -4
_INT_MAX = 2**31 - 1


def keep_memory() -> bool:
    """Keep memory the worker frees for its next batches instead of giving it back.

    glibc's allocator returns every block of more than a few MiB to the kernel when it is
    freed (and the top of its heap once enough is free), and a batch frees tens of MiB of
    numpy arrays. Memory given back is faulted in again page by page; on a virtual machine
    whose balloon reports free memory to the host (free page reporting), the guest's free
    pages go back to the host within seconds, and writing them again cost 36 times as much
    as writing memory just freed (2.3 against 0.064 ms per MiB on the machine of
    DEVELOPERS.md: ``scripts/bench_machine.py``, ``touch_ms_per_mib``). Taking every block
    from the heap (no mmap) and never trimming it keeps the memory in the process, where
    the next batch finds it: the resident size is then the high-water mark of the heap
    (1,000,000 items: 189 bytes an item against 160). Only glibc has these knobs;
    elsewhere this does nothing. Returns whether both were set.
    """
    try:
        mallopt = ctypes.CDLL(None).mallopt
    except (OSError, AttributeError):  # no C library by that name, or not glibc
        return False
    mallopt.argtypes = [ctypes.c_int, ctypes.c_int]
    mallopt.restype = ctypes.c_int
    return bool(mallopt(_M_MMAP_MAX, 0)) and bool(mallopt(_M_TRIM_THRESHOLD, _INT_MAX))


def tune_process(settings: Settings) -> None:
    """What a process that runs a worker sets once: the collector, the allocator and its
    niceness (raised to ``settings.nice``; never lowered, which would need privilege)."""
    tune_gc()
    if settings.keep_memory:
        keep_memory()
    raise_niceness(settings.nice)


def raise_niceness(target: int) -> None:
    """Make this process at least as nice as ``target``.

    A busy worker at the default niceness holds a core for its whole time slice when
    Redis or a reader wakes on the same host, and a lookup then waits for the slice to
    end (milliseconds, see the README's Operations); at 19 the woken process runs at once.
    """
    current = os.nice(0)
    if target > current:
        os.nice(target - current)


def _answers_in(entry: Any) -> int:
    """Answers in one raw entry: 1, or those of its pack (``codec.pack_answer_count``)."""
    f = entry[1]
    pack = f[1] if f and len(f) == 2 and f[0] == b"pack" else None
    return pack_answer_count(pack) if pack else 1


def answers_total(entries: Sequence[Any]) -> int:
    """Answers in raw entries (``_answers_in`` summed). A batch with no two-field entry
    holds no pack: then it is one answer per entry, found without a call per entry."""
    try:
        if 2 not in set(map(len, map(_FIELDS, entries))):
            return len(entries)
    except TypeError:  # a pending entry whose content was deleted (fields None)
        pass
    return sum(map(_answers_in, entries))


_FIELDS = operator.itemgetter(1)


def read_command(consumer: str, streams: tuple[str, ...], ids: str, count: int,
                 block: int | None) -> tuple[Any, ...]:
    """The XREADGROUP of one batch over ``streams``."""
    args: list[Any] = ["XREADGROUP", "GROUP", GROUP, consumer, "COUNT", count]
    if block is not None:
        args += ["BLOCK", block]
    return (*args, "STREAMS", *streams, *([ids] * len(streams)))


def read_reply(reply: Any) -> list[Any]:
    """A raw XREADGROUP reply as ``[(stream, [[id, [f, v, ...]], ...]), ...]``.

    redis-py would turn every entry into a tuple and a dict; the codec reads the flat field
    lists directly (the usual field order by position), which is most of the saving.
    (RESP3 replies are a map of stream to entries, RESP2 ones a list of pairs.)
    """
    if not reply:
        return []
    return list(reply.items()) if isinstance(reply, dict) else reply


def read_streams(client: redis.Redis, command: tuple[Any, ...]) -> list[Any]:
    """Send one XREADGROUP on the worker's connection and return its raw reply."""
    conn = client.connection  # the worker's client holds one connection (see commit.send)
    if conn is None:
        raise RuntimeError("the worker's client must be a single-connection client")
    conn.send_command(*command, check_health=False)
    return read_reply(conn.read_response())


_CONN_ERRORS = (redis.ConnectionError, redis.TimeoutError, ConnectionError, TimeoutError)


def may_run_time(client: redis.Redis) -> bool:
    """Whether Redis lets this user run TIME, which starts and ends every sized batch's
    transaction (an ACL refusal there would abort the whole transaction)."""
    try:
        client.execute_command("TIME")
    except redis.exceptions.NoPermissionError:
        return False
    return True


def _transient(exc: BaseException) -> bool:
    """Worth a reload and a retry: a lost connection, or Redis refusing writes at maxmemory.

    A batch refused for memory was not applied at all: while Redis is over maxmemory it
    refuses every command queued in a MULTI, and EXEC then aborts the whole transaction.
    """
    return isinstance(exc, _CONN_ERRORS) or (
        isinstance(exc, (redis.ResponseError, CommitError)) and "maxmemory" in str(exc))

log = structlog.get_logger("streamgroup.worker")


class Worker:
    """Drives the engine from ``{NS}:items`` and ``{NS}:answers``; see the module doc."""

    def __init__(self, settings: Settings, metrics: WorkerMetrics | None = None,
                 clock: Callable[[], float] = time.time) -> None:
        self.settings = settings
        self.metrics = metrics
        self.clock = clock
        self.keys = Keys(settings.ns)
        self.caps = Caps(settings.questions_maxlen, settings.decisions_maxlen,
                         settings.dead_maxlen)
        self.state: WorkerState | None = None
        self.client: redis.Redis | None = None
        self._stop = False
        self._held: _Held | None = None
        self._backlog: list[Any] = []  # answer entries read but not yet processed
        self._ahead: list[Any] | None = None  # the next batch, read ahead with a commit
        self._max_answers = max(settings.batch, BATCH_ANSWERS)
        self.sizer = ReadSizer(settings.batch, settings.hold_ms)  # entries asked per read
        self._pending_first = True
        self._next_claim = 0.0
        self._next_plan = 0.0
        self._next_snapshot = 0.0
        self._journal_bytes = 0  # journal written since the last snapshot
        self._snapshot_bytes = 0  # size of the last snapshot written
        self.batches = 0
        self.retries = 0
        self._epoch: str | None = None  # the deployment epoch once loaded: reloads need it
        self.health: Any = None
        self.progress = Progress(settings, self.keys, self.caps.history)
        self.holder = lease.holder_name(settings.consumer_name)  # this process's lease
        self._lease_ms = int(settings.lease_ttl * 1000)
        self._next_renew = 0.0
        self._had_lease = False  # taken once by this process

    # -- control ------------------------------------------------------------------------
    def request_stop(self) -> None:
        """Ask the loop to stop after the batch in hand (safe from a signal handler)."""
        self._stop = True

    @property
    def stopping(self) -> bool:
        return self._stop

    def run(self) -> int:
        """Connect, recover, loop until stopped; return the process exit code."""
        http = None
        self._log = log.bind(ns=self.settings.ns, consumer=self.settings.consumer_name)
        try:
            http = self._start_http()
            self.start()
            while not self._stop:
                self.step()
            while self._ahead is not None:  # read ahead before the stop: in hand, so apply it
                self.step()
            self._final_snapshot()
            self._log.info("worker stopped", reason="stop requested", batches=self.batches)
            return EXIT_OK
        except StateError as exc:
            self._log.error("worker stopped", reason="inconsistent state", error=str(exc))
            return EXIT_STATE
        except lease.LeaseLost as exc:
            self._log.error("worker stopped", reason="lease lost", error=str(exc))
            return EXIT_LEASE
        except _Stopped:
            self._log.info("worker stopped", reason="stop requested while reconnecting")
            return EXIT_OK
        except Exception:  # noqa: BLE001 - the supervisor restarts us; say why first
            self._log.exception("worker stopped", reason="unexpected error")
            return EXIT_ERROR
        finally:
            if self.health is not None:
                self.health.set_ready(False)
            if http is not None:
                http.close()
            self.close()

    def _start_http(self) -> Any:
        if not self.settings.metrics_addr:
            return None
        from ..serve.http import Health, start_http

        if self.metrics is None:
            self.metrics = WorkerMetrics()
        self.health = Health(metrics=self.metrics)
        return start_http(self.settings.metrics_addr, self.metrics, self.health)

    def start(self) -> None:
        """Connect and load the committed state (retrying while Redis is unreachable)."""
        if not hasattr(self, "_log"):
            self._log = log.bind(ns=self.settings.ns, consumer=self.settings.consumer_name)
        self._with_backoff(self._recover)

    def close(self) -> None:
        """Let go of the namespace (the lease, if this worker holds it) and of Redis."""
        self._release_lease()
        self._drop_client()

    def _drop_client(self) -> None:
        if self.client is not None:
            self.client.close()
            self.client = None

    def _recover(self) -> None:
        self._drop_client()
        self.state = None
        client = recovery.connect(self.settings)
        client.ping()
        recovery.tune_socket(client)
        if not self.sizer.fixed and not may_run_time(client):
            self._log.warning("the Redis user may not run TIME (allow +time): every read "
                              "asks for batch entries, not sized by hold_ms",
                              batch=self.settings.batch)
            self.sizer = ReadSizer(self.settings.batch, 0.0)
        try:
            self._take_lease(client)
            t0 = time.monotonic()
            # state next: after a data loss, refuse before writing anything else (groups
            # included), and leave nothing behind: the lease goes too
            self.state = recovery.load_state(client, self.keys, self.settings, self.clock,
                                             expect_epoch=self._epoch)
        except BaseException:
            with contextlib.suppress(Exception):
                lease.release(client, self.keys, self.holder)
            client.close()
            raise
        self._epoch = self.state.epoch
        recovery.ensure_groups(client, self.keys)
        self.client = client
        self._held = None
        self._backlog = []
        self._ahead = None
        self._pending_first = True
        self._next_claim = 0.0
        now = self.clock()
        self._next_snapshot = now + self.settings.snapshot_every
        # the journal in Redis (replayed, not dropped) and the snapshot under it count
        # from the start: the bound below holds across restarts too
        self._journal_bytes = self.state.journal_size
        self._snapshot_bytes = self.state.snapshot_size
        self.progress.metrics, self.progress.health = self.metrics, self.health
        self.progress.reset(self.state)
        self._log.info("state loaded", seq=self.state.seq, epoch=self.state.epoch,
                       seconds=round(time.monotonic() - t0, 3))
        if self.metrics is not None:
            if hasattr(self.metrics, "budget"):
                self.metrics.budget.set(self.settings.budget)
            self.progress.refresh_gauges(self.state, force=True)
        if self.health is not None:
            self.health.set_ready(True)

    def _take_lease(self, client: redis.Redis) -> None:
        """Hold the namespace before touching its state; wait while another worker does."""
        said = 0.0
        while True:
            # only a process's first take may displace a holder of the same consumer name
            # (this worker, restarted after a crash); a reconnect must not
            other = lease.take(client, self.keys, self.holder, self._lease_ms,
                               same_name=not self._had_lease)
            if other is None:
                self._had_lease = True
                self._next_renew = time.monotonic() + self.settings.lease_ttl / 3
                return
            if self._epoch is None:
                # a standby: the namespace is in use, so its state exists; remember whose it
                # is, so that a Redis that comes back empty is refused, not started afresh
                epoch = client.get(self.keys.epoch)
                if epoch is not None:
                    self._epoch = epoch.decode()
            if time.monotonic() >= said:
                self._log.warning("another worker holds the namespace; waiting for it",
                                  holder=other, lease_ttl=self.settings.lease_ttl)
                said = time.monotonic() + 30.0
            self._sleep(min(1.0, self.settings.lease_ttl / 3))

    def _lease_reply(self, result: list[Any]) -> None:
        """Check the lease renewal that ends every batch transaction."""
        other = lease.other_holder(result[-1]) if result else "nobody"
        if other is not None:
            raise lease.LeaseLost(f"worker {other!r} holds the namespace {self.settings.ns!r} "
                                  "now; stopping (this one had stalled longer than "
                                  "lease_ttl, or a second worker was started)")
        self._next_renew = time.monotonic() + self.settings.lease_ttl / 3

    def _renew_lease(self) -> None:
        if self.client is not None and time.monotonic() >= self._next_renew:
            self._lease_reply([self.client.execute_command(
                *lease.take_command(self.keys, self.holder, self._lease_ms))])

    def _release_lease(self) -> None:
        if self.client is None:
            return
        with contextlib.suppress(Exception):  # best effort: it expires on its own
            lease.release(self.client, self.keys, self.holder)

    def _with_backoff(self, fn: Callable[[], Any]) -> Any:
        attempt = 0
        while True:
            try:
                return fn()
            except Exception as exc:
                if not _transient(exc):
                    raise
                attempt += 1
                self.retries += 1
                if self.metrics is not None:
                    self.metrics.redis_retries.inc()
                if self.health is not None:
                    self.health.set_ready(False)
                delay = min(BACKOFF_CAP, BACKOFF_BASE * 2 ** min(attempt, 16))
                delay *= random.uniform(0.5, 1.0)
                self._log.warning("redis unreachable; retrying" if isinstance(
                    exc, _CONN_ERRORS) else "redis refused a write; retrying", error=str(exc),
                                  attempt=attempt, delay=round(delay, 3))
                self._sleep(delay)

    def _sleep(self, seconds: float) -> None:
        deadline = time.monotonic() + seconds
        while True:
            if self._stop:
                raise _Stopped
            left = deadline - time.monotonic()
            if left <= 0:
                return
            if self.health is not None:  # waiting for Redis: not ready, but not hung
                self.health.beat()
            time.sleep(min(left, 0.05))

    # -- the loop -----------------------------------------------------------------------
    def step(self) -> int:
        """One turn: read a batch, process it, commit it. Returns the entries consumed."""
        try:
            return self._turn()
        except Exception as exc:
            if isinstance(exc, redis.ResponseError) and (
                    "NOGROUP" in str(exc) or "no longer exists" in str(exc)):
                # the group, or the stream a blocked read waited on, was deleted
                raise StateError(f"the consumer group {GROUP} is gone from the input streams "
                                 f"({exc}): Redis lost the namespace's data; refusing to "
                                 f"start over") from None
            if not _transient(exc):
                raise
            self.retries += 1
            if self.metrics is not None:
                self.metrics.redis_retries.inc()
            self._held = None  # its outcome is unknown: the reload decides
            self._ahead = None
            self._log.warning("connection lost; reloading state" if isinstance(
                exc, _CONN_ERRORS) else "redis refused a write; reloading state", error=str(exc))
            if self.health is not None:
                self.health.set_ready(False)
            self.state = None
            self._sleep(BACKOFF_BASE * random.uniform(0.5, 1.0))
            self._with_backoff(self._recover)
            return 0

    def run_until(self, predicate: Callable[[Worker], bool], timeout: float) -> bool:
        """Start if needed and step until ``predicate(self)`` holds (for tests)."""
        if self.state is None:
            self.start()
        deadline = time.monotonic() + timeout
        ok = predicate(self)
        while not ok and time.monotonic() < deadline:
            self.step()
            ok = predicate(self)
        self._flush()  # what the predicate saw in memory is committed on return
        return ok

    def _turn(self) -> int:
        """Read, then let Redis run the previous batch's commit while this one is processed.

        A built commit is sent only after the next read (which never blocks while a commit
        is held), and its reply is read after the next batch has been processed: Redis and
        Python work at the same time. The XREADGROUP of the batch after that goes out in
        the same write, just before the commit's MULTI (so a lookup waits behind one of the
        two, not both run back to back), and its reply is read (and kept) at the end of the
        turn, so the next turn starts without a round trip; the connection holds no unread
        reply between turns. Up to three batches are then in our pending list: committing,
        in process, read ahead. If a reply is an error or never comes, the batch
        processed meanwhile is thrown away with the rest of the in-memory state, so the
        order "commit k before k+1" and the exactly-once effect are unchanged (entries read
        ahead and not processed stay pending and are read again with id 0).
        """
        assert self.client is not None and self.state is not None
        client, keys, s = self.client, self.keys, self.settings
        streams = (keys.items, keys.answers)
        now = self.clock()
        if not self._pending_first and now >= self._next_claim:
            self._flush()  # claims use the connection: nothing of ours may be in flight
            self._claim(now)  # (a batch read ahead is in our pending list: not lost)
        if self._pending_first:
            self._flush()  # read id 0 only once nothing of ours is in flight
            self._ahead = None  # still pending: the id-0 reads return it
            ids, block = "0", None
        else:
            ids = ">"
            # (records left to publish: a read that finds nothing returns at once, and the
            # empty batch after it publishes them)
            block = None if (self._held is not None or self._stop
                             or self.state.engine.unpublished()) else s.block_ms
        t0 = time.perf_counter()
        items: list[Any] = []
        answers: list[Any] = []
        if self._backlog:  # big packs read earlier: finish them before reading more
            answers = self._take_backlog()
        else:
            if self._ahead is not None:
                reply, self._ahead = self._ahead, None
            else:
                reply = read_streams(client, read_command(s.consumer_name, streams, ids,
                                                          self.sizer.count, block))
            for name, entries in reply:
                if name == keys.items.encode():
                    items = entries
                else:
                    answers = entries
            if answers and answers_total(answers) > self._max_answers:
                self._backlog = answers
                answers = self._take_backlog()
        n = len(items) + len(answers)
        held, self._held = self._held, None
        ahead = (held is not None and n > 0 and not self._pending_first and not self._stop
                 and not self._backlog)
        if held is not None:
            send(client, held.plan, first=read_command(s.consumer_name, streams, ">",
                                                       self.sizer.count, None)
                 if ahead else None)
        built = None
        if n == 0 and self._pending_first:
            self._pending_first = False
        elif (n or self.state.engine.unpublished()
              or (now >= self._next_plan and self._worth_planning())):
            now = self.clock()
            out = process(self.state, keys.items, items, keys.answers, answers,
                          int(now * 1000))
            built = self._build(out, items, answers, now, t0)
        if held is not None:
            try:
                if ahead:  # the read went out before the transaction: its reply comes first
                    assert client.connection is not None
                    self._ahead = read_reply(client.connection.read_response()) or None
                result = receive(client, held.plan)
            except BaseException:
                if client.connection is not None:
                    client.connection.disconnect()  # replies are left unread: drop them
                raise
            self._lease_reply(result)
            self._done(held)
        if built is not None:
            self._held = built
            if self._pending_first or self._stop:
                self._flush()
        elif held is None:
            self._renew_lease()
            self.progress.periodic(self.clock(), self.state, self.client)
        return n

    def _take_backlog(self) -> list[Any]:
        """The next entries of the backlog, up to the answer cap of a batch (at least one).

        The split depends only on the entries, so a restart that rereads the remaining
        ones as pending cuts them into the same batches.
        """
        total, k = 0, 0
        backlog = self._backlog
        while k < len(backlog):
            size = _answers_in(backlog[k])
            if k and total + size > self._max_answers:
                break
            total += size
            k += 1
        out, self._backlog = backlog[:k], backlog[k:]
        return out

    def _flush(self) -> None:
        """Commit the held batch now and wait for it."""
        held, self._held = self._held, None
        if held is not None:
            assert self.client is not None
            self._lease_reply(execute(self.client, held.plan))
            self._done(held)

    def _done(self, held: _Held) -> None:
        self._next_plan = held.now + IDLE_PLAN_EVERY
        self.batches += 1
        held_us = held.plan.held_us
        self.sizer.observe(held.entries, held_us)
        self.progress.batch_done(held.out, time.perf_counter() - held.t0, self.clock(),
                                 self.state, self.client,
                                 redis_seconds=None if held_us is None else held_us / 1e6,
                                 read_count=self.sizer.count)

    def _worth_planning(self) -> bool:
        """With no input, plan() matters only while some item is still undecided."""
        assert self.state is not None
        items = self.state.engine.stats()["items"]
        return bool(items.get("waiting", 0) or items.get("asking", 0))

    def _build(self, out: Outcome, items: list[Any], answers: list[Any], now: float,
               t0: float) -> _Held:
        assert self.state is not None
        state, keys = self.state, self.keys
        snapshot = journal = None
        if now < self._next_snapshot:
            journal = out.batch.journal_bytes()
            self._journal_bytes += len(journal)
        # A journal grown past the snapshot's own size is folded in early: that bounds both
        # the memory it takes in Redis and the replay time of a restart.
        if journal is None or self._journal_bytes > max(JOURNAL_FLOOR, self._snapshot_bytes):
            snapshot, journal = self._snapshot(now), None
            self._next_snapshot = now + self.settings.snapshot_every
            self._journal_bytes, self._snapshot_bytes = 0, len(snapshot[0])
        plan = build_commit(
            keys, self.caps, records=out.records, decisions=out.decisions,
            questions=out.questions, dead=[d for _, d in out.dead], journal=journal,
            snapshot=snapshot, meta=state.meta_fields(),
            acks={keys.items: [e[0] for e in items], keys.answers: [e[0] for e in answers]},
            group=GROUP, pack_questions=self.settings.pack_questions,
            question_columns=self.settings.question_columns,
            lease=lease.take_command(keys, self.holder, self._lease_ms),
            timed=snapshot is None and not self.sizer.fixed,  # a snapshot's SET is no guide
        )
        return _Held(plan, out, now, t0, len(items) + len(answers))

    def _snapshot(self, now: float) -> tuple[bytes, int]:
        """The state's snapshot and the batch number it covers (what the commit's guard
        compares with the stored snapshot's)."""
        assert self.state is not None
        return self.state.snapshot_bytes(int(now * 1000)), self.state.seq

    def _final_snapshot(self) -> None:
        """On a clean stop, fold the journal into a snapshot so the next start is quick."""
        if self.client is None or self.state is None:
            return
        try:
            self._flush()  # normally empty: a turn that sees the stop flag commits at once
            plan = build_commit(
                self.keys, self.caps, records=None, decisions=[], questions=None, dead=[],
                journal=None, snapshot=self._snapshot(self.clock()),
                meta=self.state.meta_fields(), acks={}, group=GROUP, pack_questions=False,
                lease=lease.take_command(self.keys, self.holder, self._lease_ms))
            self._lease_reply(execute(self.client, plan))
        except Exception as exc:  # nothing is lost: the journal still holds it all
            if not _transient(exc):
                raise
            self._log.warning("final snapshot skipped", error=str(exc))

    def _claim(self, now: float) -> None:
        assert self.client is not None
        idle_ms = int(self.settings.claim_idle * 1000)
        claimed = 0
        for stream in (self.keys.items, self.keys.answers):
            claimed += recovery.claim_idle(self.client, stream, self.settings.consumer_name,
                                           idle_ms, self.settings.batch)
            recovery.forget_idle_consumers(self.client, stream, self.settings.consumer_name,
                                           idle_ms)
        self._next_claim = now + self.settings.claim_idle / 2
        if claimed:
            self._log.info("claimed idle entries of other consumers", entries=claimed)
            self._pending_first = True
            self._backlog = []  # still pending: the id-0 reads return them again
            self._ahead = None

@dataclass
class _Held:
    """A batch processed and built into its commit, not yet confirmed by Redis."""

    plan: CommitPlan
    out: Outcome
    now: float
    t0: float
    entries: int  # input entries the batch consumed (what the read sizer weighs)


class _Stopped(Exception):
    """A stop was requested while waiting to reconnect (nothing is lost: all is pending)."""


def main(argv: list[str] | None = None) -> int:
    """``python -m streamgroup.stream.worker --redis URL --ns NS [--name value ...]``."""
    import argparse
    import sys
    from dataclasses import fields

    from ..commands.run import install_signal_handlers
    from ..settings import load_settings

    p = argparse.ArgumentParser(prog="python -m streamgroup.stream.worker")
    for f in fields(Settings):
        p.add_argument("--" + f.name.replace("_", "-"), dest=f.name, default=None)
    args = p.parse_args(argv)
    settings = load_settings(vars(args), env={})
    worker = Worker(settings)
    install_signal_handlers(worker.request_stop, grace=settings.grace)
    tune_process(settings)
    code = worker.run()
    sys.stdout.flush()
    return code


if __name__ == "__main__":
    raise SystemExit(main())
