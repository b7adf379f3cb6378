"""The benchmark's yardsticks: the two-phase baseline and the mixed-crowd limit."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.stats import binom

from streamgroup.core import baseline, sprt
from streamgroup.sim import Crowd, mixed_sources


@pytest.mark.parametrize(
    ("alpha", "delta"),
    [(1e-3, 0.6), (1e-3, 0.3), (1e-3, 0.38), (1e-2, 0.2), (1e-4, 0.5), (0.05, 0.9)],
)
def test_fixed_votes_match_scipy_binomial(alpha: float, delta: float) -> None:
    """m is the smallest odd vote count whose majority error is <= alpha (scipy.stats.binom)."""
    m = baseline.fixed_votes(alpha, delta)
    q = (1 - delta) / 2
    assert m % 2 == 1
    # scipy.stats.binom: P(at least (m+1)/2 wrong answers out of m).
    assert binom.sf((m - 1) // 2, m, q) <= alpha
    if m > 1:
        assert binom.sf((m - 3) // 2, m - 2, q) > alpha
    assert baseline.majority_error(m, delta) == pytest.approx(binom.sf((m - 1) // 2, m, q),
                                                              rel=1e-9)


def test_fixed_votes_table() -> None:
    """The votes per item of the benchmark configurations stay what the README quotes."""
    assert baseline.fixed_votes(1e-3, 0.6) == 21
    assert baseline.fixed_votes(1e-3, 0.3) == 101
    assert baseline.fixed_votes(1e-3, 0.38) == 61


@pytest.mark.parametrize("delta", [0.6, 0.3])
def test_mixed_limit_equals_gambler_ruin_for_one_delta(delta: float) -> None:
    """With one delta for all sources the Monte Carlo limit is the ruin closed form (Wald 1947)."""
    got = baseline.mixed_limit([delta] * 3, 1e-3, walks=100_000, seed=3)
    want = sprt.ruin_expected_length(1e-3, delta)
    assert abs(got.mean_length - want) < 4 * got.stderr
    err = sprt.ruin_error(1e-3, delta)
    assert abs(got.error_rate - err) < 4 * np.sqrt(err * (1 - err) / got.walks)


def test_mixed_limit_counts_wrong_sources_flipped_and_clickers_as_cost() -> None:
    """A reliably wrong source is as useful as a right one; a random clicker only costs."""
    plain = baseline.mixed_limit([0.6], 1e-3, walks=50_000, seed=1)
    flipped = baseline.mixed_limit([0.6, -0.6], 1e-3, walks=50_000, seed=2)
    halved = baseline.mixed_limit([0.6, 0.0], 1e-3, walks=50_000, seed=4)
    assert abs(flipped.mean_length - plain.mean_length) < 4 * np.hypot(plain.stderr,
                                                                       flipped.stderr)
    # Half the answers carry nothing: twice the questions for the same walk.
    assert abs(halved.mean_length - 2 * plain.mean_length) < 4 * np.hypot(2 * plain.stderr,
                                                                          halved.stderr)


def test_ab_closed_form_matches_simulation() -> None:
    """The exact A x B success probability agrees with simulated bootstraps."""
    r, b, delta = 20, 15, 0.6
    exact = baseline.ab_success_probability(r, b, delta)
    assert 0.2 < exact < 0.8  # a size where a wrong formula would show
    trials = 3000
    sim = baseline.ab_success_rate(r, b, delta, trials, np.random.default_rng(11))
    assert abs(sim - exact) < 4 * np.sqrt(exact * (1 - exact) / trials)


def test_ab_size_is_the_smallest_that_reaches_99_percent() -> None:
    """|B| reaches 0.99 and |B| - 2 does not."""
    b = baseline.ab_size(200, 0.6)
    assert b % 2 == 1
    assert baseline.ab_success_probability(200, b, 0.6) >= 0.99
    assert baseline.ab_success_probability(200, b - 2, 0.6) < 0.99


def _ab_on_crowd(crowd: Crowd, r: int, b: int) -> bool:
    a_idx = np.arange(r)
    b_idx = np.arange(r, r + b)
    aa = np.repeat(a_idx, b)
    bb = np.tile(b_idx, r)
    same = crowd.answers_for(aa, bb, crowd.pick_sources(aa.size)).reshape(r, b)
    sides = baseline.ab_readout(same)
    truth = crowd.truth[:r]
    return bool(np.all(sides == (truth != truth[0])))


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_ab_bootstrap_reads_a_correct_reference_on_the_crowd(seed: int) -> None:
    """At the stated size the A x B bootstrap on the simulated crowd gives 200 correct members."""
    b = baseline.ab_size(200, 0.6)
    assert _ab_on_crowd(Crowd(200 + b, delta=0.6, seed=seed), 200, b)
    # The check can fail: far too small a block B misreads the reference.
    assert not _ab_on_crowd(Crowd(200 + 15, delta=0.6, seed=seed), 200, 15)


def test_ab_bootstrap_on_mixed_crowd_uses_the_pooled_delta() -> None:
    """Sized on the pooled delta, the A x B bootstrap also reads a mixed crowd right."""
    deltas = mixed_sources(200)
    pooled = baseline.pooled_delta(deltas)
    assert pooled == pytest.approx(0.38)
    b = baseline.ab_size(200, pooled)
    assert _ab_on_crowd(Crowd(200 + b, sources=deltas, seed=5), 200, b)


def test_two_phase_spend_arithmetic() -> None:
    """Bootstrap r*b, then m votes for each item outside A and B; B tops up only if r < m."""
    got = baseline.two_phase_spend(10_000, 200, 107, 21)
    assert got.bootstrap == 200 * 107
    assert got.spend == 200 * 107 + (10_000 - 307) * 21
    assert got.feasible
    small_ref = baseline.two_phase_spend(1000, 10, 11, 21)
    assert small_ref.spend == 10 * 11 + (1000 - 21) * 21 + 11 * 11
    assert not baseline.two_phase_spend(1000, 200, 1857, 101).feasible


def test_bad_arguments_are_refused() -> None:
    """Nonsense sizes and biases raise ValueError, not a wrong number."""
    with pytest.raises(ValueError):
        baseline.majority_error(4, 0.5)
    with pytest.raises(ValueError):
        baseline.fixed_votes(1e-3, 0.0)
    with pytest.raises(ValueError):
        baseline.ab_success_probability(10, 10, 0.5)
    with pytest.raises(ValueError):
        baseline.mixed_limit([0.0, 0.0], 1e-3)


# -- the benchmark harness (scripts/bench_spend.py) -----------------------------------


def _bench():
    import importlib.util
    from pathlib import Path

    path = Path(__file__).resolve().parent.parent / "scripts" / "bench_spend.py"
    spec = importlib.util.spec_from_file_location("bench_spend", path)
    assert spec is not None and spec.loader is not None
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    return mod


def test_clopper_pearson_matches_its_closed_forms() -> None:
    """0 errors in n: upper bound 1 - (0.025)^(1/n); n of n: lower bound 0.025^(1/n)."""
    cp = _bench().clopper_pearson
    lo, hi = cp(0, 1000)
    assert lo == 0.0
    assert hi == pytest.approx(1 - 0.025 ** (1 / 1000), rel=1e-9)
    lo, hi = cp(50, 50)
    assert lo == pytest.approx(0.025 ** (1 / 50), rel=1e-9)
    assert hi == 1.0
    lo, hi = cp(10, 10_000)
    assert lo < 1e-3 < hi


def test_bench_fixed_votes_agree_with_the_runtime_tail() -> None:
    """The benchmark's scipy m and the scipy-free m of the runtime module agree."""
    bench = _bench()
    for alpha, delta in [(1e-3, 0.6), (1e-3, 0.3), (1e-3, 0.38), (1e-4, 0.2)]:
        assert bench.fixed_votes_scipy(alpha, delta) == baseline.fixed_votes(alpha, delta)


def test_errors_are_counted_up_to_relabelling() -> None:
    """Engine labels map to the truth by the better bijection; unplaced items are no errors."""
    count = _bench().count_errors
    truth = np.array([0, 0, 1, 1, 1])
    assert count(["1", "1", "0", "0", "0"], truth) == (0, 5)
    assert count(["1", "0", "0", "0", None], truth) == (1, 4)
    assert count(["north", "north", "south", None, "north"], truth) == (1, 4)
    assert count([None] * 5, truth) == (0, 0)


@pytest.mark.parametrize("mixed", [False, True])
def test_small_bench_run_meets_the_error_target(mixed: bool) -> None:
    """A 1500-item run places every item with an error rate consistent with alpha."""
    bench = _bench()
    flags = ["--n", "1500", "--delta", "0.6", "--alpha", "1e-3", "--seed", "3", "--json"]
    res = bench.run(bench.parse(flags + (["--mixed"] if mixed else [])))
    assert res["stopped"] is None
    assert res["placed"] + res["unresolved"] == 1500
    assert res["error_ci95"][0] <= 1e-3
    assert res["reference_correct"] is True
    assert res["questions"] > res["bootstrap_questions"] > 0
    # Far below the two-phase method; past the bootstrap (which dominates at this n),
    # not far above the limit.
    assert res["questions"] < res["fixed_baseline"]
    assert (res["questions"] - res["bootstrap_questions"]) / res["per_item_limit"] < 1.6


def test_bench_table_flags_missed_targets() -> None:
    """The README table marks a run that misses a target as not met."""
    import importlib.util
    from pathlib import Path

    path = Path(__file__).resolve().parent.parent / "scripts" / "bench_table.py"
    spec = importlib.util.spec_from_file_location("bench_table", path)
    assert spec is not None and spec.loader is not None
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    base = {"mixed": False, "ratio_to_limit": 1.01, "ratio_to_fixed": 0.4,
            "bootstrap_share": 0.001, "error_ci95": [5e-4, 1.2e-3], "questions": 1000}
    rows = {"delta 0.6, W=1": {**base, "inflight": 1},
            "delta 0.6, W=8": {**base, "inflight": 8, "questions": 1030}}
    got = {t: ok for t, _, ok in mod.checks(rows, 1e-3)}
    assert got["delta 0.6, W=1: spend <= 1.05 x limit"]
    assert not got["delta 0.6, W=8: spend <= 2% above W=1 (same seed)"]
    rows["delta 0.6, W=1"]["error_ci95"] = [1.1e-3, 2e-3]
    got = {t: ok for t, _, ok in mod.checks(rows, 1e-3)}
    assert not got["delta 0.6, W=1: error CI95 low <= alpha"]
