"""The weight of one answer and the error of a decision: computed here and nowhere else.

An answer from a source of bias d about a target whose partner's side is wrong with
probability eps is right with probability (1 + d (1 - 2 eps)) / 2, so it moves the
target's log-likelihood ratio by w = ln((1 + d') / (1 - d')), d' = d (1 - 2 eps).
A per-item difficulty would join here as a further factor on d'.
"""

from __future__ import annotations

import numpy as np

_CLIP = 0.999999
# Three-point Gauss-Hermite rule for E[f(L)], L ~ N(mu, sigma^2).
_GH_Z = np.array([-np.sqrt(3.0), 0.0, np.sqrt(3.0)])
_GH_W = np.array([1.0 / 6.0, 2.0 / 3.0, 1.0 / 6.0])
_GH_Z_MIDDLE, _GH_Z_OUTER = float(_GH_Z[1]), float(_GH_Z[2])  # _GH_Z[0] is -_GH_Z[2]
_GH_W_COLUMN = _GH_W[:, None]


def answer_weights(
    delta: np.ndarray, se: np.ndarray, partner_eps: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Per answer: (w, s) where w is the LLR step and s = |dw/d delta| * se(delta).

    ``s`` is how far the step could move if the source's bias were one standard error
    off; decisions integrate over it so that a young estimate is used cautiously.
    """
    return signed_weights(delta, se, partner_shrink(partner_eps))


def partner_shrink(eps: np.ndarray) -> np.ndarray:
    """1 - 2 clip(eps, 0, 1/2): the factor by which a partner's chance ``eps`` of being on
    the wrong side shrinks an answer's bias (a new array)."""
    # (np.clip as maximum then minimum: the same values, without np.clip's Python wrapper;
    # only the sign of a zero eps may differ, and 1 - 2 eps is 1 either way)
    shrink = np.maximum(eps, 0.0)
    np.minimum(shrink, 0.5, out=shrink)
    shrink *= 2.0
    return np.subtract(1.0, shrink, out=shrink)


def signed_weights(delta: np.ndarray, se: np.ndarray, shrink: np.ndarray,
                   out: tuple[np.ndarray, np.ndarray] | None = None
                   ) -> tuple[np.ndarray, np.ndarray]:
    """:func:`answer_weights` from the partners' :func:`partner_shrink`, each times the
    sign of its answer's vote (+1 or -1); both results come out times that sign, bit for
    bit: w is odd in d (a clip, exact under negation, then :func:`_steps` of |d| signed)
    and s has no sign of its own. ``shrink`` is used as a buffer, and ``out`` (w, s), if
    given, receives the results (slices of larger arrays: see ``Ledger._weigh``).
    """
    # The same operations in the same order as
    #     d = clip(delta shrink, -C, C);  w = sign(d) ln((1 + |d|) / (1 - |d|));
    #     s = shrink 2 / (1 - d d) se
    # written into a few buffers: a recount runs this over every answer, and fresh
    # temporaries of that size cost more than the arithmetic. Signing the shrink saves a
    # recount the passes that took the sign of an unsigned w and s, and those that made
    # the shrink of every answer rather than of every partner.
    d = _clipped(delta, shrink)
    w, tmp = _steps(d, None if out is None else out[0])
    np.multiply(d, d, out=tmp)
    np.subtract(1.0, tmp, out=tmp)
    s = np.multiply(shrink, 2.0, out=shrink if out is None else out[1])
    s /= tmp
    s *= se
    return w, s


def signed_steps(delta: np.ndarray, shrink: np.ndarray, out: np.ndarray | None = None
                 ) -> np.ndarray:
    """The w of :func:`signed_weights` alone, the same bit for bit, in about half the
    passes (for a recount that needs the evidence but not its sensitivity)."""
    return _steps(_clipped(delta, shrink), out)[0]


def _clipped(delta: np.ndarray, shrink: np.ndarray) -> np.ndarray:
    d = np.multiply(delta, shrink)
    np.maximum(d, -_CLIP, out=d)
    np.minimum(d, _CLIP, out=d)
    return d


def _steps(d: np.ndarray, out: np.ndarray | None) -> tuple[np.ndarray, np.ndarray]:
    """(ln((1 + |d|) / (1 - |d|)) with the sign of d, a spare buffer of d's size).

    One log of a ratio rather than log1p(d) - log1p(-d): numpy's log runs vectorised and
    log1p does not (0.40 against 1.95-2.47 ms for 65,536 values on the machine of
    DEVELOPERS.md), and a recount weighs every answer. It differs from the log1p form by
    under 2e-15 over the clipped range (the rounding of 1 + |d|, which is felt only where
    w itself is that close to zero); taking |d| and then the sign keeps w odd in d bit for
    bit, so a signed shrink gives exactly the signed result.
    """
    a = np.abs(d)
    w = np.add(a, 1.0, out=out)
    np.subtract(1.0, a, out=a)
    w /= a
    np.log(w, out=w)
    np.copysign(w, d, out=w)
    return w, a


def decision_error(llr: np.ndarray, spread: np.ndarray) -> np.ndarray:
    """Probability that the side sign(llr) is wrong, averaged over the weights' uncertainty.

    With exact weights this is 1 / (1 + e^|llr|); the average over L ~ N(|llr|, spread^2)
    is never smaller (the function is convex there), so uncertainty delays commits.
    """
    mag = np.abs(np.asarray(llr, dtype=float))
    spread = np.asarray(spread)
    # The three nodes mag + spread z as the rows of one array, each step one call over all
    # of them (a handful of calls instead of one per node and step: the batches are small);
    # spread (-z) is -(spread z) exactly, so the outer nodes share one product. The terms
    # are added in the order a sum over an (n, 3) array adds them (bit for bit the same;
    # tests/test_ledger.py compares), without its slow reduction over a short last axis.
    shape = mag.shape if mag.shape == spread.shape else np.broadcast_shapes(mag.shape,
                                                                            spread.shape)
    nodes = np.empty((3, *shape))
    far = spread * _GH_Z_OUTER
    lo, mid, hi = nodes[0, ...], nodes[1, ...], nodes[2, ...]  # views, also when 0-d
    np.subtract(mag, far, out=lo)
    np.multiply(spread, _GH_Z_MIDDLE, out=mid)
    mid += mag
    np.add(mag, far, out=hi)
    np.minimum(nodes, 700.0, out=nodes)
    np.exp(nodes, out=nodes)
    nodes += 1.0
    weights = _GH_W_COLUMN if len(shape) == 1 else _GH_W.reshape(3, *[1] * len(shape))
    t0, t1, t2 = np.divide(weights, nodes, out=nodes)
    return (t0 + t1) + t2


def reference_eps(llr: np.ndarray, pinned: np.ndarray) -> np.ndarray:
    """Chance that a placed item's side is wrong, as seen by the items compared with it."""
    eps = 1.0 / (1.0 + np.exp(np.minimum(np.abs(llr), 700.0)))
    return np.where(pinned, 0.0, eps)
