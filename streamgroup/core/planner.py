"""Choosing the next questions: pure array arithmetic over the engine's state."""

from __future__ import annotations

import math
from functools import lru_cache

import numpy as np

from .columns import strictly_increasing

_GOLDEN_INT = 0x9E3779B97F4A7C15
_GOLDEN = np.uint64(_GOLDEN_INT)
_M64 = (1 << 64) - 1
_S11, _S27, _S30, _S31 = np.uint64(11), np.uint64(27), np.uint64(30), np.uint64(31)
_C1, _C2 = np.uint64(0xBF58476D1CE4E5B9), np.uint64(0x94D049BB133111EB)
_HALF = np.uint64(1 << 63)


def _mix_int(x: int) -> int:
    """:func:`mix` of one Python int, in Python arithmetic (no numpy call per step)."""
    z = (x + _GOLDEN_INT) & _M64
    z = ((z ^ (z >> 30)) * 0xBF58476D1CE4E5B9) & _M64
    z = ((z ^ (z >> 27)) * 0x94D049BB133111EB) & _M64
    return z ^ (z >> 31)


@lru_cache(maxsize=1024)
def _mix_salt(x: int) -> np.uint64:
    """:func:`mix` of a salt: a few fixed values per engine, hashed several times a batch."""
    return np.uint64(_mix_int(x))


def mix(x: np.ndarray | int) -> np.ndarray:
    """splitmix64: a stateless, well-spread hash; drives every planning 'coin'."""
    if type(x) is int and 0 <= x <= _M64:  # the salts: several per batch, ~9 us each in numpy
        return _mix_salt(x)  # type: ignore[return-value]
    # (np.ndim(x) without its wrapper's cost: numpy scalars and other non-sequences)
    scalar = x.ndim == 0 if isinstance(x, np.ndarray) else not isinstance(x, list | tuple)
    if scalar:  # numpy scalars (their arithmetic warns on overflow): as arrays
        return mix(np.atleast_1d(np.asarray(x, dtype=np.uint64)))[0]
    # the same steps in place, in one buffer and one temporary (array arithmetic wraps
    # silently): half the time of a fresh array per step (~7 against ~14 us for 500)
    z = np.asarray(x, dtype=np.uint64) + _GOLDEN
    t = z >> _S30
    z ^= t
    z *= _C1
    np.right_shift(z, _S27, out=t)
    z ^= t
    z *= _C2
    np.right_shift(z, _S31, out=t)
    z ^= t
    return z


def uniform(x: np.ndarray | int, salt: int) -> np.ndarray:
    """Deterministic uniforms in [0, 1) from integers and a salt."""
    h = mix(np.asarray(x, dtype=np.uint64) ^ mix(salt))
    h >>= _S11  # a fresh hash: shifted and scaled in place
    u = h.astype(np.float64)
    u /= float(1 << 53)
    return u


def coin(x: np.ndarray, salt: int) -> np.ndarray:
    """``uniform(x, salt) < 0.5`` without the floats: the uniform is the hash's top 53 bits
    over 2**53 (exact in float64), below one half exactly when the top bit is clear."""
    return mix(np.asarray(x, dtype=np.uint64) ^ mix(salt)) < _HALF


def answers_still_needed(llr: np.ndarray, boundary: float, best_step: float) -> np.ndarray:
    """The fewest further answers that could still end each item's walk.

    Never having more than this in flight means no answer in flight can turn out to be
    unneeded, so parallel questions cost latency, not spend.
    """
    if best_step <= 0:
        return np.ones(len(llr), dtype=np.int64)
    gap = np.abs(llr)  # max(ceil(max(boundary - |llr|, 0) / best_step - 1e-9), 1), in place
    np.subtract(boundary, gap, out=gap)
    np.maximum(gap, 0.0, out=gap)
    gap /= best_step
    gap -= 1e-9
    np.ceil(gap, out=gap)
    np.maximum(gap, 1, out=gap)
    return gap.astype(np.int64)


def slots(
    candidates: np.ndarray,
    need: np.ndarray,
    inflight: np.ndarray,
    counted: np.ndarray,
    window: int,
    ceiling: int,
) -> np.ndarray:
    """Questions to add now per candidate: within W, the need, and the per-item ceiling."""
    room = np.minimum(need, window) - inflight
    room = np.minimum(room, ceiling - counted - inflight)
    return np.maximum(room, 0)


def first_slots(cand: np.ndarray, each: np.ndarray, room: int) -> tuple[np.ndarray, int]:
    """The first ``room`` entries of ``cand`` with each one repeated ``each`` times, and
    how many candidates they use up entirely.

    Only the candidates up to the first one not used up are repeated: a round looks at
    a chunk of several times its room, and repeating all of it costs more than the rest.
    """
    served = int(each.cumsum().searchsorted(room, side="right"))
    return cand[:served + 1].repeat(each[:served + 1])[:room], served


def slot_ranks(targets: np.ndarray) -> np.ndarray:
    """For each entry, how many earlier entries name the same target (0, 1, 2, ...).

    Its place in the stable order of the targets minus the place where its target's run
    starts there (no np.r_ / np.repeat: a few calls fewer per round).
    """
    count = len(targets)
    if strictly_increasing(targets):  # distinct (the usual round): every rank is 0
        return np.zeros(count, dtype=np.int64)
    out = np.empty(count, dtype=np.int64)
    order = targets.argsort(kind="stable")
    ordered = targets[order]
    run_start = np.empty(count, dtype=bool)
    run_start[0] = True
    np.not_equal(ordered[1:], ordered[:-1], out=run_start[1:])
    rank = np.arange(count)
    out[order] = rank - np.maximum.accumulate(np.where(run_start, rank, 0))
    return out


def check_count(placed_questions: int, rate: float, salt: int) -> int:
    """How many check questions to add beside ``placed_questions`` (deterministic rounding)."""
    if rate <= 0 or placed_questions <= 0:
        return 0
    want = placed_questions * rate
    whole = math.floor(want)
    return whole + int(uniform(salt, 17)[()] < want - whole)
