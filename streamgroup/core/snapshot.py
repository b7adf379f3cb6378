"""Engine snapshots: all state as zstd-compressed msgpack, and back, exactly."""

from __future__ import annotations

import zlib
from typing import TYPE_CHECKING, Any

import msgpack
import numpy as np
import zstandard

from ..errors import EngineInputError
from .columns import SortedQueue
from .keyindex import KeyIndex
from .ledger import Ledger
from .packing import msgpack_pieces
from .pairset import PairSet
from .types import EngineConfig

if TYPE_CHECKING:
    from .engine import Engine

SNAPSHOT_VERSION = 1
SNAPSHOT_MAGIC = b"SGZ2"  # zstd-compressed msgpack follows
ZLIB_MAGIC = b"SGZ1"  # zlib-compressed msgpack follows (written before 2026-12; still read)


def dump(self: Engine) -> bytes:
    """Everything needed to continue exactly where ``self`` stands."""
    return encode(capture(self))


def capture(self: Engine) -> dict[str, Any]:
    """The state as :func:`encode` takes it."""
    c = self.config
    return {
        "v": SNAPSHOT_VERSION,
        "config": [c.alpha, c.inflight, c.max_outstanding, c.budget, c.item_ceiling,
                   c.question_timeout_ms, c.check_rate, c.seed, c.alpha_slack],
        "keys": self.keys.to_state(),
        "sources": list(self.source_names),
        "delta": self.delta.tobytes(),
        "se": self.se.tobytes(),
        "src_answers": self.src_answers.tobytes(),
        "pooled": [self.pooled, self.pooled_se, self.shared],
        "labels": list(self.labels),
        "seen": self.seen.to_bytes(),
        "pool": self.pool.astype(np.int64).tobytes(),
        "phase": self.phase,
        "block": self.block.astype(np.int64).tobytes(),
        "block_state": self.block_state.tobytes(),
        "counters": [self.counted_at_fit, *self.issued, self.spend, self.duplicates,
                     self.revisions, self.outstanding, self.now_ms, self.q_low, self.pool_base],
        "left": self.left_over().tobytes(),  # records left over (take_update_columns)
        "ledger": self.ledger.to_state(),
        "items": self.items.to_state(),
        "q": self.q.to_state(),
        "work": [np.concatenate([self.carry.values(), *self.nudged]).astype(np.int64).tobytes(),
                 self.cursor],
    }


def encode(state: dict[str, Any]) -> bytes:
    """:func:`capture`'s state as the snapshot's bytes (reads nothing of the engine)."""
    # The arrays are mostly small integers and zeros: compression makes the snapshot
    # several times smaller, which is what Redis holds per item. zstd at level 1 rather
    # than zlib at its fastest: at 300,000 items and 600,000 answers zstd took a quarter
    # of zlib's time for a smaller snapshot (scripts/bench_snapshot.py).
    # The msgpack form is fed to zstd in pieces, the arrays' bytes as they are: no joined
    # copy of the whole (52 MB at 300,000 items and 600,000 answers, and 40% of the time).
    pieces = msgpack_pieces(state)
    zc = zstandard.ZstdCompressor(level=1).compressobj(size=sum(map(len, pieces)))
    return b"".join([SNAPSHOT_MAGIC, *map(zc.compress, pieces), zc.flush()])


def load(cls: type[Engine], data: bytes) -> Engine:
    """Rebuild an engine from :func:`dump`'s bytes."""
    try:
        head, body = data[:4], data[4:]
        if head == SNAPSHOT_MAGIC:
            data = zstandard.ZstdDecompressor().decompress(body)
        elif head == ZLIB_MAGIC:
            data = zlib.decompress(body)
        st = msgpack.unpackb(data, raw=False)
        if st.get("v") != SNAPSHOT_VERSION:
            raise EngineInputError(f"snapshot version {st.get('v')!r} is not supported")
        eng = cls(EngineConfig(*st["config"]))
        eng.keys = KeyIndex.from_state(st["keys"], eng.keys.cache_size)  # (from the config)
        eng.source_names = list(st["sources"])
        eng.source_index = {k: i for i, k in enumerate(eng.source_names)}
        eng.delta = np.frombuffer(st["delta"], dtype=np.float64).copy()
        eng.se = np.frombuffer(st["se"], dtype=np.float64).copy()
        eng.src_answers = np.frombuffer(st["src_answers"], dtype=np.float64).copy()
        eng.pooled, eng.pooled_se, eng.shared = st["pooled"]
        eng.labels = list(st["labels"])
        eng.seen = PairSet.from_bytes(st["seen"])
        eng.pool = np.frombuffer(st["pool"], dtype=np.int64).copy()
        eng.phase = st["phase"]
        eng.block = np.frombuffer(st["block"], dtype=np.int64).copy()
        m = len(eng.block)
        eng.block_state = np.frombuffer(st["block_state"], dtype=np.int8).copy().reshape(m, m)
        (eng.counted_at_fit, s0, s1, s2, eng.spend, eng.duplicates, eng.revisions,
         eng.outstanding, eng.now_ms, eng.q_low, eng.pool_base) = st["counters"]
        eng.issued = [s0, s1, s2]
        eng.ledger = Ledger.from_state(st["ledger"])
        eng.items.load_state(st["items"])
        left = st.get("left")
        eng._restore_dirty(None if left is None else np.frombuffer(left, dtype=np.int64).copy())
        eng.q.load_state(st["q"])
        carry, eng.cursor = st["work"]
        eng.carry = SortedQueue(np.frombuffer(carry, dtype=np.int64))
    except EngineInputError:
        raise
    except (ValueError, KeyError, TypeError, AttributeError, zlib.error, zstandard.ZstdError,
            msgpack.UnpackException) as exc:
        raise EngineInputError(f"snapshot is unreadable: {exc}") from None
    return eng
