"""Learning how reliable each source is, from the answers themselves.

One-coin EM per source: an answer from source j is right with probability (1 + d_j) / 2.
The E-step takes each item's side posterior from the ledger's evidence (computed with the
current d); the M-step sets d_j to the mean expected agreement of source j's answers with
the posterior relation of the two items. A likelihood method: optional stopping does not
bias it. The prior (``PRIOR`` pseudo-answers of agreement 0) pulls a young source towards
d = 0, i.e. towards no weight, so a source is trusted only once its answers earn it.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .ledger import WEIGH_CHUNK, Ledger, running_sum

PRIOR = 2.0  # pseudo-answers that shrink a young source's bias towards 0
SE_NEW = 1.0  # standard error of a source never fitted


@dataclass
class NoiseFit:
    delta: np.ndarray  # per source
    se: np.ndarray  # per source
    answers: np.ndarray  # informative answers per source (sum of squared relation certainty)
    pooled: float
    pooled_se: float


def side_posterior(ledger: Ledger) -> np.ndarray:
    """P(side = 1) per item: exact for pinned items, logistic of the evidence otherwise."""
    llr = ledger.item("llr")
    p = 1.0 / (1.0 + np.exp(-np.clip(llr, -700, 700)))
    pinned = ledger.item("pinned")
    side = ledger.item("side")
    return np.where(pinned, side.astype(np.float64), p)


def hard_posterior(ledger: Ledger) -> np.ndarray:
    """P(side = 1) taking every placed item's side as certain (unplaced: 1/2)."""
    side = ledger.item("side")
    return np.where(side >= 0, side.astype(np.float64), 0.5)


def m_step(ledger: Ledger, n_sources: int, p: np.ndarray | None = None) -> NoiseFit:
    """One M-step over every answer that counts for at least one endpoint."""
    if p is None:
        p = side_posterior(ledger)
    lean = 2.0 * p - 1.0  # per item, then gathered: the same values as per answer
    agree = info = total = None
    # the answers slice by slice (the recount's slices: temporaries that are freed and
    # reused, not new memory each refit), each slice's sums added per source
    for rows in ledger.answer_slices():
        x, y, z = _m_sums(ledger, rows, lean, n_sources)
        agree, info = running_sum(agree, x), running_sum(info, y)
        total = running_sum(total, z)
    assert agree is not None and info is not None and total is not None
    delta = np.clip(agree / (total + PRIOR), -0.995, 0.995)
    se = np.sqrt(np.maximum(1.0 - delta**2, 0.05) / (info + PRIOR))
    n = float(total.sum())
    pooled = float(np.clip(agree.sum() / (n + PRIOR), -0.995, 0.995))
    pooled_se = float(np.sqrt(max(1.0 - pooled**2, 0.05) / (info.sum() + PRIOR)))
    return NoiseFit(delta, se, info, pooled, pooled_se)


def _m_sums(ledger: Ledger, rows: slice, lean: np.ndarray, n_sources: int
            ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Per source over the counted answers among ``rows``: the sum of x r (agreement with
    the expected relation), of r r (its certainty) and the count."""
    counted = ledger.answer("direction")[rows] != 0
    a, b, src, same = (ledger.answer(name)[rows] for name in ("a", "b", "src", "same"))
    every = np.count_nonzero(counted) == len(counted)  # (at scale nearly every answer)
    # r = lean[a] lean[b] is the expected relation sign (+1 same, -1 different); x r and
    # r r are built in chunks of answers whose temporaries stay in the cache (the counted
    # ones picked chunk by chunk: no full copy of a, b and same), elementwise (the same
    # values), and each summed in one bincount per slice
    size = len(a) if every else int(np.count_nonzero(counted))
    xr, rr = np.empty(size), np.empty(size)
    at = 0
    for lo in range(0, len(a), WEIGH_CHUNK):
        part = slice(lo, lo + WEIGH_CHUNK)
        pa, pb, ps = a[part], b[part], same[part]
        if not every:
            keep = counted[part]
            pa, pb, ps = pa.compress(keep), pb.compress(keep), ps.compress(keep)
        out = slice(at, at + len(pa))
        at += len(pa)
        r = lean.take(pa)
        r *= lean.take(pb)
        np.multiply(ps, r, out=xr[out])
        np.multiply(r, r, out=rr[out])
    # one widening of the sources for the three sums (bincount takes intp)
    src = (src if every else src.compress(counted)).astype(np.intp)
    return (np.bincount(src, weights=xr, minlength=n_sources),
            np.bincount(src, weights=rr, minlength=n_sources),
            np.bincount(src, minlength=n_sources).astype(np.float64))


def fit(ledger: Ledger, delta: np.ndarray, se: np.ndarray, iterations: int = 3,
        cold: bool = False, current: bool = False) -> NoiseFit:
    """Alternate evidence and source biases a few times, warm-started from ``delta``.

    ``cold`` starts from the placed sides taken as certain (the bootstrap's first fit,
    where every source's bias is still unknown and a zero weight would be a fixed point).
    ``current``: the ledger's evidence is already that of ``delta`` (the engine's running
    evidence, between batches), so the first M-step reads it without a recount first. It
    differs from a recount only in the partners' discounts each answer took when it was
    counted; the biases learned moved by about 1e-10 (``bench_spend.py``: the same
    questions and errors in 22 runs) and the refit takes a fifth less time.
    """
    n_sources = len(delta)
    result = NoiseFit(delta, se, np.zeros(n_sources), 0.0, SE_NEW)
    if cold:
        result = m_step(ledger, n_sources, hard_posterior(ledger))
    # placements and directions stay as they are during a fit: several recounts share
    # one list of counted pairs, and those before the last need only the evidence (m_step
    # reads nothing else; the last recount writes every sum). A single recount (a refit
    # between batches) takes the answers slice by slice instead: no full-size list.
    several = iterations > 1 or not current
    pairs = ledger.counted_pairs() if several else None
    for k in range(iterations):
        if not (current and k == 0):
            ledger.recompute(result.delta, result.se, settle=cold and k == 0, pairs=pairs,
                             llr_only=True)
        result = m_step(ledger, n_sources)
    ledger.recompute(result.delta, result.se, pairs=pairs)
    return result
