"""The read sizer: how many entries a read asks for, from Redis's time per transaction."""

from __future__ import annotations

import pytest
from hypothesis import given
from hypothesis import strategies as st

from streamgroup.stream.sizing import LEAST, ReadSizer


def settle(sizer: ReadSizer, us_per_entry: float, fixed_us: float, rounds: int = 200) -> int:
    """Feed the sizer full batches whose Redis time is ``fixed + per entry x entries``."""
    for _ in range(rounds):
        n = sizer.count
        sizer.observe(n, fixed_us + us_per_entry * n)
    return sizer.count


@given(per=st.floats(0.5, 8.0), fixed=st.floats(0.0, 150.0), hold_ms=st.floats(0.3, 2.0))
def test_reads_settle_where_a_transaction_takes_the_hold_time(per: float, fixed: float,
                                                              hold_ms: float) -> None:
    """With Redis's time linear in the entries (a fixed part plus a cost per entry), the
    count settles at the entries whose transaction takes hold_ms, (hold - fixed) / per,
    clamped to [min(most, 100), most]: the fixed point of count = hold / (time / count)
    for time = fixed + per x count (our own algebra; no outside source)."""
    sizer = ReadSizer(2000, hold_ms)
    want = max(LEAST, min(2000, (hold_ms * 1000 - fixed) / per))
    got = settle(sizer, per, fixed)
    assert abs(got - want) <= 0.01 * want + 1


def test_a_slow_redis_shrinks_reads_and_a_fast_one_grows_them() -> None:
    sizer = ReadSizer(500, 0.8)
    assert sizer.count == LEAST  # it starts short and grows from what it measures
    assert settle(sizer, 0.5, 10) == 500  # 0.5 us an entry: 1,580 would fit; capped
    assert settle(sizer, 4.0, 10) == 197  # (800 - 10) / 4
    assert settle(sizer, 40.0, 10) == LEAST  # never below the floor


def test_short_batches_and_untimed_ones_leave_the_count_alone() -> None:
    sizer = ReadSizer(500, 0.8)
    settle(sizer, 2.0, 0.0)
    assert sizer.count == 400
    sizer.observe(150, 150 * 50.0)  # under half the count: the input ran dry
    sizer.observe(400, None)  # a batch that wrote a snapshot is not timed
    sizer.observe(0, 10.0)
    assert sizer.count == 400


def test_sizing_off_or_small_batches_read_the_configured_batch() -> None:
    for sizer in (ReadSizer(500, 0.0), ReadSizer(LEAST, 0.8), ReadSizer(10, 0.8)):
        assert sizer.fixed
        before = sizer.count
        assert before == sizer.most
        settle(sizer, 100.0, 0.0)
        assert sizer.count == before


@pytest.mark.parametrize("most, hold", [(0, 0.8), (100, -1.0)])
def test_bad_arguments_are_refused(most: int, hold: float) -> None:
    with pytest.raises(ValueError):
        ReadSizer(most, hold)
