"""Start-up: connect, check the deployment epoch, load the snapshot and replay the journal.

The committed state of a namespace is ``{NS}:snapshot`` plus the ``{NS}:journal`` entries
written after it (one per committed batch). The epoch key ``{NS}:epoch`` is written once,
in the same transaction as the first snapshot, so the two always exist together. Any
other combination means data was lost or the keys were mixed up, and the worker refuses
to start rather than silently starting over (which would re-spend every paid answer).
"""

from __future__ import annotations

import contextlib
import os
import socket
import time
from collections.abc import Iterator
from typing import Any

import redis
import structlog
from redis.backoff import NoBackoff
from redis.retry import Retry

from ..errors import StateError
from ..keys import GROUP, Keys
from ..settings import Settings
from .state import Batch, WorkerState

log = structlog.get_logger("streamgroup.recovery")

JOURNAL_CHUNK = 200  # journal entries fetched per XRANGE during replay


def connect(settings: Settings) -> redis.Redis:
    """A client that never retries on its own.

    redis-py's default retry would re-send a MULTI/EXEC whose reply was lost, and so could
    commit a batch twice; the worker retries itself, after reloading its state.
    """
    timeout = max(10.0, settings.block_ms / 1000.0 + 10.0)
    # keepalive probes are a TCP option: a unix socket's connection class refuses it
    tcp = {} if settings.redis.startswith("unix:") else {"socket_keepalive": True}
    return redis.Redis.from_url(
        settings.redis, decode_responses=False, retry=Retry(NoBackoff(), 0),
        socket_timeout=timeout, socket_connect_timeout=5.0, health_check_interval=0,
        single_connection_client=True, **tcp,
    )


SEND_BUFFER = 4 << 20  # bytes; the kernel caps it at net.core.wmem_max


def tune_socket(client: redis.Redis) -> None:
    """A send buffer that holds a whole batch transaction.

    Then sending a commit returns at once instead of waiting while Redis parses it, and
    the worker processes the next batch meanwhile (measured: ~0.8 ms saved per batch of
    500 on loopback). Best effort: a socket that refuses the option is left as it is.
    """
    conn = client.connection
    sock = getattr(conn, "_sock", None) if conn is not None else None
    if sock is None:
        return
    with contextlib.suppress(OSError):
        sock.setsockopt(socket.SOL_SOCKET, socket.SO_SNDBUF, SEND_BUFFER)


def ensure_groups(client: redis.Redis, keys: Keys) -> None:
    """Create the worker's group on both input streams (reading from the very start)."""
    for stream in (keys.items, keys.answers):
        try:
            client.xgroup_create(stream, GROUP, id="0", mkstream=True)
        except redis.ResponseError as exc:
            if "BUSYGROUP" not in str(exc):
                raise


def new_epoch(now: float) -> str:
    return f"{int(now * 1000)}-{os.urandom(6).hex()}"


def load_state(client: redis.Redis, keys: Keys, settings: Settings,
               clock: Any = time.time, expect_epoch: str | None = None) -> WorkerState:
    """The committed state of the namespace, creating it on the very first start.

    ``expect_epoch``: the epoch this process loaded before (a reload after a lost
    connection). Then the namespace must still carry it: an empty Redis means its data
    was lost (restarted without persistence, flushed), not a first start.
    """
    pipe = client.pipeline(transaction=False)
    pipe.get(keys.epoch)
    pipe.get(keys.snapshot)
    pipe.exists(keys.journal)
    pipe.exists(keys.assign)
    epoch_raw, snap, has_journal, has_assign = pipe.execute()
    if expect_epoch is not None and (epoch_raw or b"").decode() != expect_epoch:
        found = "no epoch key" if epoch_raw is None else f"epoch {epoch_raw.decode()}"
        raise StateError(
            f"namespace {keys.ns!r}: the state this worker was running (epoch "
            f"{expect_epoch}) is gone: Redis now has {found} ({keys.epoch}); its data was "
            f"lost or replaced (a restart without persistence, a flush?); refusing to "
            f"start over")
    if epoch_raw is None:
        present = [name for name, there in (("snapshot", snap is not None),
                                            ("journal", has_journal), ("assign", has_assign))
                   if there]
        if present:
            raise StateError(
                f"namespace {keys.ns!r} has {', '.join(present)} but no epoch key "
                f"{keys.epoch}: its state is incomplete or foreign; refusing to start over "
                f"(delete the namespace's keys to start afresh)")
        return _create(client, keys, settings, clock)
    epoch = epoch_raw.decode()
    if snap is None:
        raise StateError(
            f"namespace {keys.ns!r} has epoch {epoch} but no snapshot {keys.snapshot}: the "
            f"committed state was lost (a Redis restart without persistence?); refusing "
            f"to start over")
    state = WorkerState.from_snapshot(snap, epoch, settings.aid_window)
    kept = getattr(state.engine, "config", None)
    wanted = settings.engine_config()
    if kept is not None and kept != wanted:
        changed = {f: (getattr(kept, f), getattr(wanted, f)) for f in wanted.__slots__
                   if getattr(kept, f, None) != getattr(wanted, f)}
        log.warning("engine settings differ from the committed state; the committed ones "
                    "stay in force (start a new namespace to change them)",
                    ns=keys.ns, differ={k: {"committed": a, "given": b}
                                        for k, (a, b) in changed.items()})
    replay_journal(client, keys, state)
    return state


def _create(client: redis.Redis, keys: Keys, settings: Settings, clock: Any) -> WorkerState:
    epoch = new_epoch(clock())
    state = WorkerState.fresh(settings.engine_config(), epoch, settings.aid_window)
    pipe = client.pipeline(transaction=True)
    pipe.set(keys.epoch, epoch, nx=True)
    pipe.set(keys.snapshot, state.snapshot_bytes(int(clock() * 1000)), nx=True)
    created, _ = pipe.execute()
    if not created:  # another worker created the namespace a moment ago: use its state
        return load_state(client, keys, settings, clock)
    # a guard left over from an earlier life of the namespace would hold back its snapshots
    client.unlink(keys.snapshot_seq)
    return state


def journal_entries(client: redis.Redis, keys: Keys) -> Iterator[tuple[Batch, int]]:
    """Every journal entry, in order: the batch and the size of its entry in bytes."""
    start = "-"
    while True:
        rows = client.xrange(keys.journal, min=start, max="+", count=JOURNAL_CHUNK)
        if not rows:
            return
        for _eid, fields in rows:
            yield Batch.from_journal(fields[b"b"]), len(fields[b"b"])
        start = "(" + rows[-1][0].decode()


def replay_journal(client: redis.Redis, keys: Keys, state: WorkerState) -> int:
    """Re-apply every journaled batch newer than the snapshot; returns how many.

    Two entries in a row for one batch number: the later one is the batch as committed,
    the earlier one a leftover of a transaction cut short. Redis 7.0 (AOF with
    ``aof-load-truncated yes``) can keep the first commands of a transaction that a power
    cut broke off and run them at a later load in front of the next transaction, which
    after a restart is the worker's redo of that same batch, read again and perhaps split
    into batches differently. The batches after it were built on the redo, so the redo is
    what replay applies. The entries' bytes are added to ``state.journal_size``.
    """
    n = 0
    held: Batch | None = None
    for batch, size in journal_entries(client, keys):
        state.journal_size += size
        if held is not None and batch.seq == held.seq:
            log.warning("the journal holds two entries for one batch; the later one is "
                        "kept (a transaction cut short, replayed by Redis)", ns=keys.ns,
                        batch=batch.seq)
        elif held is not None:
            n += _replay_one(keys, state, held)
        held = batch
    if held is not None:
        n += _replay_one(keys, state, held)
    return n


def _replay_one(keys: Keys, state: WorkerState, batch: Batch) -> int:
    if batch.seq <= state.seq:
        return 0
    if batch.seq != state.seq + 1:
        raise StateError(f"journal {keys.journal} jumps from batch {state.seq} to "
                         f"{batch.seq}: entries are missing")
    state.replay(batch)
    return 1


def claim_idle(client: redis.Redis, stream: str, consumer: str, idle_ms: int,
               count: int) -> int:
    """Move entries idle at other consumers (for longer than ``idle_ms``) to us.

    They then sit in our own pending list and are read with id ``0`` like our own
    leftovers. Returns how many were claimed.
    """
    start = "0-0"
    claimed = 0
    while True:
        # (redis-py drops the cursor from JUSTID replies, so take the entries too)
        reply = client.xautoclaim(stream, GROUP, consumer, idle_ms, start_id=start,
                                  count=count)
        nxt, ids = reply[0], reply[1]
        claimed += len(ids)
        if nxt in (b"0-0", "0-0"):
            return claimed
        start = nxt


def forget_idle_consumers(client: redis.Redis, stream: str, consumer: str, idle_ms: int
                          ) -> list[str]:
    """Remove other consumers that hold nothing and were idle past ``idle_ms``.

    With the default consumer name (hostname-pid) every restart adds a consumer to the
    group; without this the group's consumer list would grow with every deployment.
    """
    gone = []
    for c in client.xinfo_consumers(stream, GROUP):
        name = c["name"].decode() if isinstance(c["name"], bytes) else str(c["name"])
        if name != consumer and int(c["pending"]) == 0 and int(c["idle"]) > idle_ms:
            client.xgroup_delconsumer(stream, GROUP, name)
            gone.append(name)
    return gone
