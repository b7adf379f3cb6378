"""Floods: a producer far faster than the worker. Memory, question caps and lag under load.

The heavier variants (10 million answers, several bursts) are in scripts/flood_heavy.py.
"""

from __future__ import annotations

import pytest

from tests import floodkit

pytestmark = [pytest.mark.redis, pytest.mark.slow]


def test_a_burst_of_a_million_packed_answers() -> None:
    """1,000,000 packed answers at once: all counted once, caps held, lag back to 0, trimmed."""
    res = floodkit.flood(1_000_000)
    assert res.passed, res.as_dict()
    assert res.details["counted"] == 1_000_000


def test_one_answer_entries_faster_than_the_worker_reads_them() -> None:
    """200,000 plain entries written while the worker is paused, then read: nearly all of
    them wait as a backlog, and reads stay within three batches."""
    res = floodkit.flood(200_000, n_items=2_000, per_entry=1)
    assert res.passed, res.as_dict()
    assert res.details["lag_entries_at_end_of_burst"] >= 190_000
