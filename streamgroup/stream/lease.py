"""One worker per namespace: a lease in ``{NS}:lease`` that a second worker waits for.

The value names the holder (``random:consumer``, new for every process); it expires
``lease_ttl`` seconds after its last renewal. A worker takes the lease before it loads
the state, renews it inside every batch transaction (and every ``lease_ttl / 3`` seconds
while idle), and deletes it on a clean stop. A worker that finds the lease held by
another waits, not ready, until it is free (a hot standby); one that finds at a renewal
that another worker holds it stops at once with exit code 4.

A starting worker takes over at once from a holder with its own consumer name: that is
the same worker restarted after a crash, whose lease would otherwise block it for up to
``lease_ttl``. (Two live workers under one consumer name are a mistake anyway; with this
rule they take turns loudly, each exiting with code 4, instead of splitting the input.)

What this guards against: a second worker started on the same namespace by mistake. What
it does not: a worker stalled for longer than ``lease_ttl`` (paused VM, stopped process)
that wakes up after another took over can still commit the one batch it had in hand
before its renewal reports the loss. Keep ``lease_ttl`` well above any pause you expect.
"""

from __future__ import annotations

import secrets
from typing import Any

import redis

from ..errors import StreamgroupError
from ..keys import Keys

TOKEN_CHARS = 12  # hex characters of the random part of a holder name

# KEYS[1] = lease; ARGV[1] = holder, ARGV[2] = ttl in ms, ARGV[3] = "1" to also take it
# from a holder with the same consumer name. Take or renew the lease when it is free or
# already ours (returns 1); otherwise return the current holder.
TAKE = f"""
local v = redis.call('GET', KEYS[1])
local mine = v == false or v == ARGV[1]
if not mine and ARGV[3] == '1' then
  mine = string.sub(v, {TOKEN_CHARS + 2}) == string.sub(ARGV[1], {TOKEN_CHARS + 2})
end
if mine then
  redis.call('SET', KEYS[1], ARGV[1], 'PX', ARGV[2])
  return 1
end
return v
"""

# KEYS[1] = lease; ARGV[1] = holder. Delete the lease only if it is ours.
RELEASE = """
if redis.call('GET', KEYS[1]) == ARGV[1] then
  return redis.call('UNLINK', KEYS[1])
end
return 0
"""


class LeaseLost(StreamgroupError):
    """Another worker holds this namespace's lease: this one must stop."""


def holder_name(consumer: str) -> str:
    return f"{secrets.token_hex(TOKEN_CHARS // 2)}:{consumer}"


def take_command(keys: Keys, holder: str, ttl_ms: int, same_name: bool = False
                 ) -> tuple[Any, ...]:
    """The command that takes or renews the lease (also queued inside each transaction)."""
    return ("EVAL", TAKE, 1, keys.lease, holder, ttl_ms, "1" if same_name else "0")


def other_holder(reply: Any) -> str | None:
    """None if the reply of :func:`take_command` says the lease is ours, else the holder."""
    if reply == 1:
        return None
    return reply.decode("utf-8", "replace") if isinstance(reply, bytes) else str(reply)


def take(client: redis.Redis, keys: Keys, holder: str, ttl_ms: int, same_name: bool = False
         ) -> str | None:
    """Take or renew the lease; return None on success, else who holds it."""
    return other_holder(client.execute_command(*take_command(keys, holder, ttl_ms,
                                                             same_name)))


def release(client: redis.Redis, keys: Keys, holder: str) -> bool:
    return bool(client.execute_command("EVAL", RELEASE, 1, keys.lease, holder))
