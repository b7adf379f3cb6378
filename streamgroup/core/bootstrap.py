"""Cold start: infer the sides of a dense block of items from all pairs asked among them.

The +-1 answer matrix of a block is, up to noise, delta * s s^T for the side vector s in
{-1, +1}^m, so its leading eigenvector recovers s. Each member is then voted against the
others (the ledger does that once the block is marked placed) and only members whose own
evidence passes the bound are admitted to the reference.
"""

from __future__ import annotations

import numpy as np


def block_sides(m: int, i: np.ndarray, j: np.ndarray, x: np.ndarray) -> np.ndarray:
    """Sides (0/1) of block positions 0..m-1 from answers x (+1 same, -1 different)."""
    mat = np.zeros((m, m))
    np.add.at(mat, (i, j), x)
    np.add.at(mat, (j, i), x)
    _, vecs = np.linalg.eigh(mat)
    v = vecs[:, -1]
    sides = (v > 0).astype(np.int8)
    if sides[0] != 0:  # side 0 is the side of the first block member
        sides = 1 - sides
    return sides


def grow_size(m: int, n_items: int) -> int:
    """Next block size when the current one did not yield enough reference members."""
    return min(n_items, max(m + 8, int(m * 1.5)))
