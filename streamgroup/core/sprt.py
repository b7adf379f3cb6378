"""Wald's sequential probability ratio test for one item, and its closed forms.

With a source of bias delta (right with probability (1+delta)/2) and a perfect
reference, each answer moves the item's log-likelihood ratio by +-w, w = ln((1+d)/(1-d)).
The test commits when |LLR| >= A = ln((1-alpha)/alpha). In units of w this is a
symmetric random walk absorbed at +-k, k = ceil(A / w): a gambler's ruin, whose error
and expected length have closed forms (Wald, "Sequential Analysis", 1947).
"""

from __future__ import annotations

import math

import numpy as np


def threshold(alpha: float) -> float:
    """The commit boundary A = ln((1-alpha)/alpha)."""
    return math.log((1.0 - alpha) / alpha)


def weight(delta: float | np.ndarray) -> float | np.ndarray:
    """Evidence of one answer from a source of bias ``delta``: ln((1+d)/(1-d)).

    Negative for a source that is reliably wrong, so its answers count flipped.
    """
    d = np.clip(delta, -0.999999, 0.999999)
    out = np.log1p(d) - np.log1p(-d)
    return float(out) if np.ndim(out) == 0 else out


def steps_needed(alpha: float, delta: float) -> int:
    """k: net agreements the walk needs to reach the boundary."""
    w = weight(delta)
    if w <= 0:
        raise ValueError("delta must be positive")
    # Guard against k*w landing a rounding error below A.
    return max(1, math.ceil(threshold(alpha) / w - 1e-12))


def ruin_error(alpha: float, delta: float) -> float:
    """Probability that the walk ends at the wrong boundary (gambler's ruin)."""
    k = steps_needed(alpha, delta)
    r = (1.0 + delta) / (1.0 - delta)
    return 1.0 / (1.0 + r**k)


def ruin_expected_length(alpha: float, delta: float) -> float:
    """E[N] of the walk absorbed at +-k with step probabilities (1+d)/2, (1-d)/2.

    For a walk from 0 with drift p - q = delta: E[N] = k (1 - 2 P(err)) / delta.
    """
    k = steps_needed(alpha, delta)
    return k * (1.0 - 2.0 * ruin_error(alpha, delta)) / delta


def per_item_limit(n: int, alpha: float, delta: float) -> float:
    """n * E[N]: the spend of the SPRT that knows delta and has a perfect reference."""
    return n * ruin_expected_length(alpha, delta)
