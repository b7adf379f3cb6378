"""Yardsticks for the engine's spend: the two-phase fixed-vote method and the mixed-crowd limit.

Nothing here runs in the worker; the benchmarks and tests measure the engine against it.
Pure numpy and ``math`` (no scipy at run time: the tests check these tails against
``scipy.stats.binom``).

The two-phase method, as a baseline:

1. **A x B bootstrap.** Take a block A of ``r`` items (the reference, the same size as the
   engine's) and a block B of ``b`` other items; ask every pair (u, w), u in A, w in B.
   For a pair (u, v) inside A, each w in B gives one product of two answers,
   s(u, w) * s(v, w) (+1 = "same"), which is right with probability (1 + delta^2)/2; the
   pair is decided by the majority of its ``b`` products (``b`` odd, so no ties). The
   reference sides are read through the first member of A (the anchor): u is on the
   anchor's side iff the pair (anchor, u) is decided "same". The reference is all correct
   iff all r - 1 anchor pairs are decided right.
2. **Fixed votes.** Every other item is compared with ``m`` reference members and put on
   the side of the majority, ``m`` the smallest odd number whose binomial majority error is
   at most alpha. Members of B already hold ``r`` answers against the reference, so when
   ``r >= m`` they need nothing more (counted in the baseline's favour).

``b`` is sized by an exact closed form (not a simulation): conditioned on the number j of
B members on which the anchor's own answer is wrong, the r - 1 anchor-pair decisions are
independent, each right with probability P(X + Y > b/2), X ~ Bin(b - j, p), Y ~ Bin(j, 1-p),
p = (1 + delta)/2. Averaging P_j^(r-1) over j ~ Bin(b, 1 - p) gives the probability that the
reference is all correct; ``b`` is the smallest odd size where it reaches the target
(0.99 by default). :func:`ab_success_rate` checks the closed form by simulation.

With a mixed crowd and no knowledge of who is reliable, every answer comes from a uniformly
random source, so it is right with probability (1 + mean delta)/2 independently of the
others: the two-phase method on a mixed crowd is exactly the method on the pooled delta.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from .sprt import threshold, weight

# -- binomial tails (scipy-free) -------------------------------------------------


def _check_delta(delta: float) -> None:
    if not (0.0 < delta < 1.0) or math.isnan(delta):
        raise ValueError(f"delta must be in (0, 1), got {delta!r}")


def majority_error(m: int, delta: float) -> float:
    """P(the majority of m independent answers is wrong), each right w.p. (1+delta)/2; m odd."""
    if m < 1 or m % 2 == 0:
        raise ValueError(f"m must be a positive odd number, got {m!r}")
    _check_delta(delta)
    q = (1.0 - delta) / 2.0
    lq, lp = math.log(q), math.log1p(-q)
    # Terms in logs: comb(m, k) overflows a float well before the tail is negligible.
    total = 0.0
    for k in range((m + 1) // 2, m + 1):
        total += math.exp(math.log(math.comb(m, k)) + k * lq + (m - k) * lp)
    return min(1.0, total)


def _smallest_odd(ok) -> int:
    """Smallest odd m >= 1 with ok(m), for a predicate monotone in odd m."""
    # Work on i with m = 2i + 1: double to bracket, then bisect.
    if ok(1):
        return 1
    lo, hi = 0, 1  # not ok(2*lo + 1), and hi still to be tested
    while not ok(2 * hi + 1):
        lo, hi = hi, 2 * hi
    while hi - lo > 1:
        mid = (lo + hi) // 2
        if ok(2 * mid + 1):
            hi = mid
        else:
            lo = mid
    return 2 * hi + 1


def fixed_votes(alpha: float, delta: float) -> int:
    """m: the smallest odd number of votes whose majority errs with probability <= alpha."""
    if not (0.0 < alpha < 0.5):
        raise ValueError(f"alpha must be in (0, 0.5), got {alpha!r}")
    _check_delta(delta)
    return _smallest_odd(lambda m: majority_error(m, delta) <= alpha)


# -- the A x B bootstrap -----------------------------------------------------------


def _log_binom_pmf(n: int, p: float, logfact: np.ndarray) -> np.ndarray:
    k = np.arange(n + 1)
    with np.errstate(divide="ignore"):
        return (
            logfact[n] - logfact[k] - logfact[n - k]
            + k * math.log(p) + (n - k) * math.log1p(-p)
        )


def ab_success_probability(r: int, b: int, delta: float) -> float:
    """P(the A x B bootstrap with |A| = r, |B| = b reads all r members of A right); exact."""
    if r < 1 or b < 1 or b % 2 == 0:
        raise ValueError(f"need r >= 1 and odd b >= 1, got r={r!r}, b={b!r}")
    _check_delta(delta)
    if r == 1:
        return 1.0
    p = (1.0 + delta) / 2.0
    logfact = np.concatenate([[0.0], np.cumsum(np.log(np.arange(1, b + 1)))])
    anchor = np.exp(_log_binom_pmf(b, 1.0 - p, logfact))  # j = anchor's wrong answers
    need = (b + 1) // 2  # correct products needed
    total = 0.0
    for j in range(b + 1):
        if anchor[j] < 1e-300:
            continue
        px = np.exp(_log_binom_pmf(b - j, p, logfact))  # u right where the anchor is right
        py = np.exp(_log_binom_pmf(j, 1.0 - p, logfact))  # u wrong where the anchor is wrong
        # P(X >= t) for t = 0..b-j+1 (the last entry is 0).
        sf_x = np.concatenate([np.cumsum(px[::-1])[::-1], [0.0]])
        t = np.clip(need - np.arange(j + 1), 0, b - j + 1)
        p_right = min(1.0, float(py @ sf_x[t]))
        total += anchor[j] * p_right ** (r - 1)
    return min(1.0, total)


def ab_size(r: int, delta: float, confidence: float = 0.99) -> int:
    """The smallest odd |B| for which A x B reads a reference of r right w.p. >= confidence."""
    if not (0.0 < confidence < 1.0):
        raise ValueError(f"confidence must be in (0, 1), got {confidence!r}")
    _check_delta(delta)
    return _smallest_odd(lambda b: ab_success_probability(r, b, delta) >= confidence)


def ab_readout(same: np.ndarray) -> np.ndarray:
    """Sides of A (0 = the anchor's side) from the r x b matrix of answers (True = "same").

    Row i holds member i of A against each member of B; row 0 is the anchor. Pair
    (anchor, u) is "same" iff most of its products s(anchor, w) * s(u, w) are +1.
    """
    s = np.where(np.asarray(same, dtype=bool), 1, -1).astype(np.int64)
    if s.ndim != 2 or s.shape[1] % 2 == 0:
        raise ValueError("need an r x b answer matrix with b odd")
    votes = s @ s[0]
    return (votes < 0).astype(np.int8)


def ab_success_rate(
    r: int, b: int, delta: float, trials: int, rng: np.random.Generator
) -> float:
    """Fraction of simulated A x B bootstraps whose reference is all correct."""
    ok = 0
    p = (1.0 + delta) / 2.0
    for _ in range(trials):
        side_a = rng.integers(0, 2, size=r)
        side_b = rng.integers(0, 2, size=b)
        truly_same = side_a[:, None] == side_b[None, :]
        right = rng.random((r, b)) < p
        got = ab_readout(np.where(right, truly_same, ~truly_same))
        ok += bool(np.all(got == (side_a != side_a[0])))
    return ok / trials


@dataclass(frozen=True, slots=True)
class TwoPhase:
    """Spend of the two-phase method on n items."""

    reference: int  # r = |A|
    block: int  # b = |B|
    votes: int  # m per remaining item
    bootstrap: int  # r * b questions
    spend: int  # bootstrap plus the votes
    feasible: bool  # r + b <= n: the method can be run at this n at all


def two_phase_spend(n: int, reference: int, block: int, votes: int) -> TwoPhase:
    """Spend of the two-phase method given its sizes (B members reuse their r answers)."""
    rest = max(0, n - reference - block)
    top_up = max(0, votes - reference) * min(block, max(0, n - reference))
    bootstrap = reference * block
    return TwoPhase(
        reference, block, votes, bootstrap, bootstrap + rest * votes + top_up,
        reference + block <= n,
    )


def two_phase(
    n: int, alpha: float, delta: float, reference: int = 200, confidence: float = 0.99
) -> TwoPhase:
    """The two-phase method sized for this n, alpha and delta (m by :func:`fixed_votes`)."""
    return two_phase_spend(n, reference, ab_size(reference, delta, confidence),
                           fixed_votes(alpha, delta))


def pooled_delta(deltas: Sequence[float]) -> float:
    """Bias of one answer from a uniformly random source of the crowd."""
    return float(np.mean(np.asarray(deltas, dtype=float)))


# -- the limit on a mixed crowd ----------------------------------------------------


@dataclass(frozen=True, slots=True)
class WalkLimit:
    """Monte Carlo estimate of the SPRT that knows every source's delta."""

    mean_length: float  # E[N], answers per item
    stderr: float  # standard error of mean_length
    error_rate: float  # fraction of walks absorbed at the wrong boundary
    walks: int


def mixed_limit(
    deltas: Sequence[float],
    alpha: float,
    walks: int = 100_000,
    seed: int = 0,
    max_steps: int = 1_000_000,
) -> WalkLimit:
    """Mean length of the per-item SPRT when each answer comes from a random source of the crowd.

    Each step draws a source uniformly; the answer is right w.p. (1 + d)/2 and moves the LLR
    (towards the truth) by +w if right and -w if wrong, w = ln((1 + d)/(1 - d)) of that
    source (negative w for a reliably wrong source: its answers count flipped; zero for a
    random clicker, whose answer still costs a question). A walk commits at
    |LLR| >= ln((1 - alpha)/alpha).
    """
    d = np.asarray(deltas, dtype=float)
    if d.ndim != 1 or d.size == 0 or np.any(np.abs(d) >= 1.0) or np.any(np.isnan(d)):
        raise ValueError("deltas must be a non-empty list of values in (-1, 1)")
    if not np.any(d != 0.0):
        raise ValueError("a crowd of random clickers never decides")
    if walks < 1:
        raise ValueError("walks must be positive")
    w = np.asarray(weight(d), dtype=float).reshape(-1)
    p_right = (1.0 + d) / 2.0
    # A hair of slack so that k * w landing a rounding error below A still commits, as in
    # sprt.steps_needed.
    bound = threshold(alpha) - 1e-9
    rng = np.random.default_rng(seed)
    llr = np.zeros(walks)
    length = np.zeros(walks, dtype=np.int64)
    live = np.arange(walks)
    for _ in range(max_steps):
        if live.size == 0:
            break
        src = rng.integers(0, d.size, size=live.size)
        right = rng.random(live.size) < p_right[src]
        llr[live] += np.where(right, w[src], -w[src])
        length[live] += 1
        live = live[np.abs(llr[live]) < bound]
    if live.size:
        raise RuntimeError(f"{live.size} walks undecided after {max_steps} steps")
    return WalkLimit(
        mean_length=float(length.mean()),
        stderr=float(length.std(ddof=1) / math.sqrt(walks)) if walks > 1 else 0.0,
        error_rate=float(np.mean(llr < 0)),
        walks=walks,
    )
