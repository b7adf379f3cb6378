"""The SPRT's closed forms against simulated walks (Wald, "Sequential Analysis", 1947)."""

from __future__ import annotations

import numpy as np
import pytest

from streamgroup.core import sprt


@pytest.mark.parametrize("delta", [0.3, 0.6])
def test_gambler_ruin_closed_forms_match_simulation(delta: float) -> None:
    """Error and E[N] of the walk match the gambler's-ruin closed forms (Wald 1947)."""
    alpha = 0.05
    k = sprt.steps_needed(alpha, delta)
    rng = np.random.default_rng(7)
    walks = 4000
    pos = np.zeros(walks, dtype=int)
    steps = np.zeros(walks, dtype=int)
    live = np.ones(walks, dtype=bool)
    while live.any():
        move = np.where(rng.random(live.sum()) < (1 + delta) / 2, 1, -1)
        pos[live] += move
        steps[live] += 1
        live &= np.abs(pos) < k
    err = np.mean(pos < 0)
    expected_err = sprt.ruin_error(alpha, delta)
    se = np.sqrt(expected_err * (1 - expected_err) / walks)
    assert abs(err - expected_err) < 4 * se + 1e-9
    mean_n = steps.mean()
    assert abs(mean_n - sprt.ruin_expected_length(alpha, delta)) < 4 * steps.std() / np.sqrt(walks)


def test_steps_needed_integer_edge() -> None:
    """At alpha=1e-3 and delta=0.6 five net agreements suffice; at 0.598 six are needed."""
    assert sprt.steps_needed(1e-3, 0.6) == 5
    assert sprt.steps_needed(1e-3, 0.598) == 6
