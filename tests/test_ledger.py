"""The evidence ledger: order independence and the pending-answer rule."""

from __future__ import annotations

import math

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st

from streamgroup.core import noise
from streamgroup.core.evidence import (
    _GH_W,
    _GH_Z,
    answer_weights,
    decision_error,
    partner_shrink,
    signed_steps,
    signed_weights,
)
from streamgroup.core.ledger import UNPLACED, Ledger

N_REF, N_TGT, N_SRC = 6, 5, 3
DELTA = np.array([0.6, 0.3, -0.4])
SE = np.array([0.01, 0.02, 0.05])

answer = st.tuples(
    st.integers(0, N_REF - 1), st.integers(N_REF, N_REF + N_TGT - 1),
    st.integers(0, N_SRC - 1), st.booleans(),
)


def _ledger() -> Ledger:
    led = Ledger()
    led.add_items(N_REF + N_TGT)
    led.items["side"][:N_REF] = [0, 1, 0, 1, 1, 0]
    led.items["pinned"][:N_REF] = True
    return led


@settings(max_examples=60, deadline=None)
@given(st.lists(answer, min_size=1, max_size=40), st.randoms(use_true_random=False),
       st.integers(1, 5))
def test_evidence_is_the_same_whatever_the_arrival_order(rows, rnd, chunks) -> None:
    """Any order and any split into batches gives the same evidence per item."""
    def evidence(order):
        led = _ledger()
        arr = np.array(order)
        for part in np.array_split(arr, min(chunks, len(arr))):
            if len(part) == 0:
                continue
            idx = led.append_answers(part[:, 1], part[:, 0], part[:, 2], part[:, 3] == 1)
            led.count(idx, DELTA, SE)
        return led.item("llr").copy(), led.item("count").copy()

    shuffled = list(rows)
    rnd.shuffle(shuffled)
    llr1, n1 = evidence(rows)
    llr2, n2 = evidence(shuffled)
    np.testing.assert_allclose(llr1, llr2, atol=1e-9)
    np.testing.assert_array_equal(n1, n2)


def test_answer_between_unplaced_items_waits_then_counts() -> None:
    """An answer between two unplaced items counts for one as soon as the other is placed."""
    led = Ledger()
    led.add_items(2)
    idx = led.append_answers(np.array([0]), np.array([1]), np.array([0]), np.array([True]))
    assert led.count(idx, DELTA, SE).size == 0 and len(led.pending) == 1
    led.items["side"][0] = 1
    led.items["pinned"][0] = True
    released = led.release_pending()
    led.count(released, DELTA, SE)
    assert led.item("llr")[1] > 0 and led.item("llr")[0] == 0
    assert led.item("side")[1] == UNPLACED and len(led.pending) == 0


def test_reliably_wrong_source_is_flipped() -> None:
    """A source with negative bias moves the evidence the opposite way of what it says."""
    led = _ledger()
    idx = led.append_answers(np.array([N_REF]), np.array([1]), np.array([2]), np.array([True]))
    led.count(idx, DELTA, SE)
    assert led.item("llr")[N_REF] < 0  # said "same as a side-1 item", from a liar


def test_decision_error_matches_logistic_without_uncertainty() -> None:
    """With exact weights the error of a decision is 1 / (1 + e^|L|)."""
    llr = np.array([-7.0, 0.0, 3.0])
    np.testing.assert_allclose(decision_error(llr, np.zeros(3)), 1 / (1 + np.exp(np.abs(llr))))
    far = np.array([-7.0, 3.0])
    assert (decision_error(far, np.full(2, 0.5)) > 1 / (1 + np.exp(np.abs(far)))).all()


def _decision_error_on_nodes(llr: np.ndarray, spread: np.ndarray) -> np.ndarray:
    """The straightforward form: an (n, 3) array of node terms summed over the last axis."""
    mag = np.abs(llr)[..., None] + spread[..., None] * _GH_Z
    return (_GH_W / (1.0 + np.exp(np.minimum(mag, 700.0)))).sum(axis=-1)


@settings(max_examples=200, deadline=None)
@given(st.lists(st.tuples(st.floats(-1e6, 1e6), st.floats(0, 1e6)), max_size=70),
       st.sampled_from([1, 1000, 20_000]))
def test_decision_error_is_bit_for_bit_the_node_sum(rows: list[tuple[float, float]],
                                                     repeat: int) -> None:
    """decision_error adds its three node terms by hand; the result must equal the sum over
    an (n, 3) array to the last bit, at any length (numpy's loops differ by size)."""
    base = np.array(rows, dtype=float).reshape(-1, 2)
    rng = np.random.default_rng(len(rows))
    extra = np.column_stack([rng.normal(0, 8, repeat), rng.exponential(1.0, repeat)])
    both = np.concatenate([base, extra])
    llr, spread = both[:, 0], both[:, 1]
    got, want = decision_error(llr, spread), _decision_error_on_nodes(llr, spread)
    assert got.tobytes() == want.tobytes()
    assert decision_error(llr[0], spread[0]).tobytes() == want[0].tobytes()


@settings(max_examples=200, deadline=None)
@given(st.lists(st.tuples(st.floats(-1.5, 1.5), st.floats(0, 2), st.floats(-0.2, 0.8)),
                min_size=1, max_size=60))
def test_answer_weights_are_bit_for_bit_the_formula(rows: list[tuple[float, float, float]]
                                                    ) -> None:
    """answer_weights works in a few buffers; it must give exactly the plain expressions."""
    delta, se, eps = (np.array(c, dtype=float) for c in zip(*rows, strict=True))
    shrink = 1.0 - 2.0 * np.clip(eps, 0.0, 0.5)
    d = np.clip(delta * shrink, -0.999999, 0.999999)
    want_w = np.copysign(np.log((1.0 + np.abs(d)) / (1.0 - np.abs(d))), d)
    # ln((1 + d) / (1 - d)) is 2 atanh(d): Python's math module as the outside reference
    assert np.allclose(want_w, [2.0 * math.atanh(x) for x in d.tolist()], rtol=0,
                       atol=4e-15)
    want_s = np.abs(shrink * 2.0 / (1.0 - d * d)) * se
    w, s = answer_weights(delta, se, eps)
    assert w.tobytes() == want_w.tobytes() and s.tobytes() == want_s.tobytes()
    assert delta.tolist() == [r[0] for r in rows] and eps.tolist() == [r[2] for r in rows]
    # a recount signs the shrink with each vote instead of signing w and s afterwards
    sign = np.where(np.arange(len(rows)) % 3 == 1, -1.0, 1.0)
    w, s = signed_weights(delta, se, partner_shrink(eps) * sign)
    assert w.tobytes() == (want_w * sign).tobytes() and s.tobytes() == (want_s * sign).tobytes()
    # the steps alone (a recount of the evidence only) are the same bits
    assert signed_steps(delta, partner_shrink(eps) * sign).tobytes() == w.tobytes()


def _random_ledger(r: np.random.Generator, n_items: int, n_ans: int, n_src: int,
                   p_same: float, llr_sd: float = 0.0
                   ) -> tuple[Ledger, slice, np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Items some placed (some pinned), with evidence if ``llr_sd``, and random answers
    between distinct items: (ledger, their rows, a, b, src, same)."""
    led = Ledger()
    led.add_items(n_items)
    led.items["side"][:n_items] = r.integers(-1, 2, n_items)
    led.items["pinned"][:n_items] = r.random(n_items) < 0.2
    if llr_sd:
        led.items["llr"][:n_items] = r.normal(0, llr_sd, n_items)
    a = r.integers(0, n_items, n_ans)
    b = (a + r.integers(1, n_items, n_ans)) % n_items
    src = r.integers(0, n_src, n_ans)
    same = r.random(n_ans) < p_same
    return led, led.append_answers(a, b, src, same), a, b, src, same


def test_an_evidence_only_recount_gives_the_full_recounts_evidence() -> None:
    """``recompute(llr_only=True)`` (the first recount of a refit) weighs without the
    sensitivities, in chunks as a large recount does: the evidence is the full recount's
    bit for bit, and the sums it does not rebuild are left as they were."""
    from streamgroup.core.ledger import WEIGH_CHUNK

    n_items, n_ans = 3000, 2 * WEIGH_CHUNK + 77  # chunked, with a short last chunk
    led, *_ = _random_ledger(np.random.default_rng(8), n_items, n_ans, 3, 0.5, llr_sd=4)
    start = {k: led.item(k).copy() for k in ("llr", "s1", "s2", "count")}
    led.recompute(DELTA, SE)
    full = {k: led.item(k).copy() for k in start}
    assert len(led.counted_pairs().target) > WEIGH_CHUNK
    for k in start:
        led.items[k][:n_items] = start[k]
    led.recompute(DELTA, SE, llr_only=True)
    assert led.item("llr").tobytes() == full["llr"].tobytes()
    for k in ("s1", "s2", "count"):
        assert led.item(k).tobytes() == start[k].tobytes() != full[k].tobytes()


def test_recount_equals_the_answer_by_answer_sum() -> None:
    """A full recount (one pass over every answer, each item's discount computed once)
    and counting the same answers in small batches both give, to rounding, the sum
    written answer by answer from the formula in core/evidence.py."""
    n_items, n_ans = 40, 400
    led, rows, a, b, src, same = _random_ledger(np.random.default_rng(5), n_items, n_ans, 3,
                                                0.5, llr_sd=4)
    llr0 = led.item("llr").copy()  # the partners' evidence both passes discount by
    led.recompute(DELTA, SE)
    full = led.item("llr").copy()
    led.items["llr"][:n_items] = llr0
    t_small = []
    for part in np.array_split(np.arange(rows.start, rows.stop), 7):
        target, step, _ = led._contributions(part, DELTA, SE)
        t_small.append((target, step))
    side, pinned = led.item("side"), led.item("pinned")
    want = np.zeros(n_items)
    for i in range(n_ans):  # the formula, one answer and one counted endpoint at a time
        for t, p, counted in ((a[i], b[i], side[b[i]] >= 0), (b[i], a[i], side[a[i]] >= 0)):
            if not counted:
                continue
            eps = 0.0 if pinned[p] else 1.0 / (1.0 + np.exp(min(abs(llr0[p]), 700.0)))
            d = np.clip(DELTA[src[i]] * (1.0 - 2.0 * min(max(eps, 0.0), 0.5)), -0.999999,
                        0.999999)
            want[t] += (1 if same[i] else -1) * (2.0 * side[p] - 1.0) * (np.log1p(d)
                                                                       - np.log1p(-d))
    got_small = np.bincount(np.concatenate([t for t, _ in t_small]),
                            weights=np.concatenate([s for _, s in t_small]),
                            minlength=n_items)
    np.testing.assert_allclose(full, want, rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(got_small, want, rtol=1e-12, atol=1e-12)


def _plain_fit(led: Ledger, delta: np.ndarray, se: np.ndarray, iterations: int,
               cold: bool) -> noise.NoiseFit:
    """noise.fit written out with a full recount (its own pairs, every sum) each time."""
    result = noise.NoiseFit(delta, se, np.zeros(len(delta)), 0.0, noise.SE_NEW)
    if cold:
        result = noise.m_step(led, len(delta), noise.hard_posterior(led))
    for k in range(iterations):
        led.recompute(result.delta, result.se, settle=cold and k == 0)
        result = noise.m_step(led, len(delta))
    led.recompute(result.delta, result.se)
    return result


@settings(max_examples=40, deadline=None)
@given(st.integers(0, 2**32 - 1), st.integers(1, 3), st.booleans())
def test_fit_sharing_its_pairs_equals_full_recounts(seed: int, iterations: int,
                                                    cold: bool) -> None:
    """A fit lists the counted pairs once and rebuilds only the evidence before its last
    recount: the biases it learns and every item's sums must be those of full recounts."""
    rng = np.random.default_rng(seed)
    n_items, n_ans, n_src = 30, 200, 4
    ledgers = []
    for _ in range(2):
        ledgers.append(_random_ledger(np.random.default_rng(seed), n_items, n_ans, n_src,
                                      0.6)[0])
    delta, se = rng.uniform(-0.5, 0.9, n_src), rng.uniform(0.01, 0.3, n_src)
    got = noise.fit(ledgers[0], delta, se, iterations=iterations, cold=cold)
    want = _plain_fit(ledgers[1], delta, se, iterations, cold)
    for name in ("delta", "se", "answers"):
        assert getattr(got, name).tobytes() == getattr(want, name).tobytes()
    assert (got.pooled, got.pooled_se) == (want.pooled, want.pooled_se)
    for name in ("llr", "s1", "s2", "count"):
        assert ledgers[0].item(name).tobytes() == ledgers[1].item(name).tobytes()


@settings(max_examples=40, deadline=None)
@given(st.integers(0, 2**32 - 1))
def test_m_step_equals_its_formula(seed: int) -> None:
    """m_step takes 2 p - 1 per item and gathers it per answer: the same biases as the
    formula written per answer."""
    r = np.random.default_rng(seed)
    n_items, n_ans, n_src = 25, 150, 3
    led = Ledger()
    led.add_items(n_items)
    led.items["side"][:n_items] = r.integers(-1, 2, n_items)
    led.items["llr"][:n_items] = r.normal(0, 3, n_items)
    a = r.integers(0, n_items, n_ans)
    b = (a + r.integers(1, n_items, n_ans)) % n_items
    led.append_answers(a, b, r.integers(0, n_src, n_ans), r.random(n_ans) < 0.5)
    p = noise.side_posterior(led)
    got = noise.m_step(led, n_src)
    counted = led.answer("direction") != 0
    ca, cb = led.answer("a")[counted], led.answer("b")[counted]
    src = led.answer("src")[counted]
    x = led.answer("same")[counted].astype(np.float64)
    rel = (2.0 * p[ca] - 1.0) * (2.0 * p[cb] - 1.0)
    agree = np.bincount(src, weights=x * rel, minlength=n_src)
    info = np.bincount(src, weights=rel * rel, minlength=n_src)
    total = np.bincount(src, minlength=n_src).astype(np.float64)
    want = np.clip(agree / (total + noise.PRIOR), -0.995, 0.995)
    assert got.delta.tobytes() == want.tobytes()
    assert got.answers.tobytes() == info.tobytes()


@settings(max_examples=30, deadline=None)
@given(st.integers(0, 2**32 - 1), st.integers(1, 64), st.booleans())
def test_a_recount_in_chunks_is_bit_for_bit_one_pass(seed: int, chunk: int,
                                                     settle: bool) -> None:
    """Recounts weigh their pairs in chunks (temporaries that stay in the cache): every
    item's sums must be those of one pass over all pairs, whatever the chunk size."""
    import streamgroup.core.ledger as ledger_mod

    sums = []
    for size in (chunk, 1 << 40):
        r = np.random.default_rng(seed)
        n_src = 5
        led = _random_ledger(r, 40, 300, n_src, 0.6, llr_sd=3)[0]
        delta, se = r.uniform(-0.5, 0.9, n_src), r.uniform(0.01, 0.3, n_src)
        saved = ledger_mod.WEIGH_CHUNK
        ledger_mod.WEIGH_CHUNK = size
        try:
            led.recompute(delta, se, settle=settle)
        finally:
            ledger_mod.WEIGH_CHUNK = saved
        sums.append([led.item(name).tobytes() for name in ("llr", "s1", "s2", "count")])
    assert sums[0] == sums[1]


@settings(max_examples=30, deadline=None)
@given(st.integers(0, 2**32 - 1), st.integers(1, 120), st.booleans())
def test_a_recount_slice_by_slice_equals_one_pass_to_rounding(seed: int, size: int,
                                                              settle: bool) -> None:
    """A recount without shared pairs, a refit between batches and the M-step take the
    answers slice by slice (their temporaries reused, not new memory as the ledger grows)
    and add the per-item and per-source sums: the same sums as one pass, to rounding
    (only the order of addition differs), and the same counts exactly. The reference is
    numpy's one-pass bincount over every answer, as before the slices."""
    import streamgroup.core.ledger as ledger_mod

    got: list[tuple[dict[str, np.ndarray], noise.NoiseFit, noise.NoiseFit]] = []
    saved = ledger_mod.RECOUNT_SLICE
    for one_slice in (False, True):
        r = np.random.default_rng(seed)
        n_src = 4
        led = _random_ledger(r, 12, 400, n_src, 0.6, llr_sd=3)[0]
        delta, se = r.uniform(-0.5, 0.9, n_src), r.uniform(0.01, 0.3, n_src)
        ledger_mod.RECOUNT_SLICE = 1 << 40 if one_slice else size
        try:
            # slices of at least twice the items: several unless the size is unlimited
            assert len(led.answer_slices()) == (1 if one_slice else
                                                math.ceil(400 / max(size, 2 * 12)))
            led.recompute(delta, se, settle=settle)
            sums = {k: led.item(k).copy() for k in ("llr", "s1", "s2", "count")}
            m = noise.m_step(led, n_src)
            refit = noise.fit(led, delta, se, iterations=1, current=True)
            sums["after_refit"] = led.item("llr").copy()
            per_source = led.answers_per_source(n_src)
            assert per_source.tolist() == np.bincount(led.answer("src"),
                                                      minlength=n_src).tolist()
        finally:
            ledger_mod.RECOUNT_SLICE = saved
        got.append((sums, m, refit))
    (sliced, m1, f1), (whole, m2, f2) = got
    for k in ("llr", "s1", "s2", "after_refit"):
        np.testing.assert_allclose(sliced[k], whole[k], rtol=1e-12, atol=1e-12)
    assert sliced["count"].tobytes() == whole["count"].tobytes()
    for a, b in ((m1, m2), (f1, f2)):
        np.testing.assert_allclose(a.delta, b.delta, rtol=1e-12, atol=1e-14)
        np.testing.assert_allclose(a.answers, b.answers, rtol=1e-12)


def test_answers_per_source_are_kept_as_the_answers_come_and_survive_a_reload() -> None:
    """The per-source counts (the refits' source shares, ``status`` and the metrics) are
    kept per batch, with sources that first answer late: always numpy's bincount over
    every stored answer, before and after a snapshot round trip."""
    r = np.random.default_rng(11)
    led = Ledger()
    led.add_items(50)
    for k in range(1, 8):  # sources 0 .. 3k - 1 so far: new ones keep appearing
        n = int(r.integers(0, 40))
        a = r.integers(0, 50, n)
        led.append_answers(a, (a + r.integers(1, 50, n)) % 50, r.integers(0, 3 * k, n),
                           r.random(n) < 0.5)
        want = np.bincount(led.answer("src"), minlength=30)
        assert led.answers_per_source(30).tolist() == want.tolist()
        assert led.answers_per_source(5).tolist() == want[:5].tolist()
    again = Ledger.from_state(led.to_state())
    assert again.answers_per_source(30).tolist() == led.answers_per_source(30).tolist()
