"""The batch transaction's question appends, against a real redis-server."""

from __future__ import annotations

import pytest
import redis

from streamgroup.core.types import QuestionColumns
from streamgroup.keys import QUESTION_FIELDS, Keys
from streamgroup.stream.commit import QUESTION_RUNS, _question_entries, _xadd_many

pytestmark = pytest.mark.redis
K = Keys("tc")


def _entries(r: redis.Redis, stream: str) -> list[dict[str, str]]:
    return [{k.decode(): v.decode() for k, v in f.items()} for _, f in r.xrange(stream)]


def _columns(qids: list[str], whys: list[str], ts: list[int]) -> QuestionColumns:
    n = len(qids)
    return QuestionColumns(qids, [f"kiln-{i:04d}" for i in range(n)],
                           [f"shard-é{i}" for i in range(n)], whys, ts)


@pytest.mark.parametrize("qids, whys, ts", [
    ([str(q) for q in range(1200, 1207)], ["seed"] * 2 + ["place"] * 4 + ["check"], [77] * 7),
    ([str(q) for q in range(9_007_199_254_740_980, 9_007_199_254_740_983)], ["place"] * 3,
     [5] * 3),
    (["0"], ["place"], [1]),
    (["4", "6", "7"], ["place"] * 3, [9] * 3),  # a gap: the general script
    (["1", "2"], ["place"] * 2, [3, 4]),  # two clock readings: the general script
])
def test_question_runs_write_what_the_field_by_field_script_writes(
        redis_url: str, qids: list[str], whys: list[str], ts: list[int]) -> None:
    """Questions appended from runs (first qid, one ts, why counts) read back field for
    field as the general per-field script writes them, qids included."""
    r = redis.Redis.from_url(redis_url)
    qc = _columns(qids, whys, ts)
    cmd = _question_entries("{tc}:q1", 0, qc)
    r.execute_command(*cmd)
    vals: list[object] = []
    for row in zip(qc.qid, qc.a, qc.b, qc.why, qc.ts_ms, strict=True):
        vals += row
    r.execute_command(*_xadd_many("{tc}:q2", 0, QUESTION_FIELDS, vals))
    got, want = _entries(r, "{tc}:q1"), _entries(r, "{tc}:q2")
    assert got == want
    assert [e["qid"] for e in got] == qids
    assert (cmd[1] == QUESTION_RUNS) == (qids[0] != "4" and len(set(ts)) == 1)


def test_question_runs_cap_the_stream(redis_url: str) -> None:
    """The cap argument trims the questions stream (approximately) as before."""
    r = redis.Redis.from_url(redis_url)
    n = 3000
    qc = _columns([str(q) for q in range(n)], ["place"] * n, [1] * n)
    r.execute_command(*_question_entries(K.questions, 100, qc))
    assert r.xlen(K.questions) < n
