"""Reading a run from Redis (read-only) and the per-item limit it is measured against."""

from __future__ import annotations

import math
from collections.abc import Iterator
from dataclasses import dataclass, field
from typing import Any

import msgpack
import numpy as np

from ..core.baseline import mixed_limit
from ..core.sprt import ruin_expected_length, threshold, weight
from ..keys import Keys

MAX_POINTS = 2000  # history samples plotted; longer runs are thinned evenly
TOP_SOURCES = 30  # sources drawn in the reliability plot (by answers)
HISTORY_FIELDS = ("placed", "asking", "waiting", "unresolved", "spend", "outstanding")


@dataclass
class RunData:
    """What the report needs, decoded from Redis into plain arrays."""

    ns: str
    alpha: float
    history: dict[str, np.ndarray] = field(default_factory=dict)  # "ts" (s) + HISTORY_FIELDS
    status: np.ndarray = field(default_factory=lambda: np.array([], dtype=object))
    answers: np.ndarray = field(default_factory=lambda: np.array([], dtype=np.int64))
    revisions: int = 0
    pinned: int = 0
    sources: list[dict[str, Any]] = field(default_factory=list)  # source, delta, se, answers


def _s(v: Any) -> str:
    return v.decode("utf-8", "replace") if isinstance(v, bytes) else str(v)


def _unpack(raw: bytes) -> dict[str, Any]:
    value = msgpack.unpackb(raw, raw=False, strict_map_key=False)
    if not isinstance(value, dict):
        raise ValueError("not a msgpack map")
    return {_s(k): v for k, v in value.items()}


def _read_history(client: Any, key: str) -> dict[str, np.ndarray]:
    rows: list[tuple[float, ...]] = []
    start = "-"
    while True:
        chunk = client.xrange(key, min=start, max="+", count=10_000)
        for entry_id, fields in chunk:
            f = {_s(k): _s(v) for k, v in fields.items()}
            try:
                ts = float(f["ts"]) / 1000.0 if "ts" in f else int(_s(entry_id).split("-")[0]) / 1e3
                rows.append((ts, *(float(f.get(name, "nan")) for name in HISTORY_FIELDS)))
            except ValueError:
                continue  # a sample we cannot read is a gap in a line, not a failed report
        if len(chunk) < 10_000:
            break
        start = "(" + _s(chunk[-1][0])
    if not rows:
        return {}
    arr = np.asarray(rows, dtype=float)
    if len(arr) > MAX_POINTS:
        arr = arr[np.linspace(0, len(arr) - 1, MAX_POINTS).astype(int)]
    return {"ts": arr[:, 0], **{n: arr[:, i + 1] for i, n in enumerate(HISTORY_FIELDS)}}


def _scan_hash(client: Any, key: str) -> Iterator[tuple[str, bytes]]:
    for k, v in client.hscan_iter(key, count=5000):
        yield _s(k), v


def read_run(client: Any, ns: str, alpha: float | None = None,
             default_alpha: float = 1e-3) -> RunData:
    """Decode the run's history, assignments and learned noise from Redis (read-only).

    ``alpha`` (for the limit): as given, else the worker's own (``alpha`` in ``{NS}:meta``),
    else ``default_alpha``.
    """
    keys = Keys(ns)
    alpha_given = alpha
    meta_alpha = None
    if alpha is None:
        raw = meta_alpha = client.hget(keys.meta, "alpha")
        try:
            alpha = float(_s(raw)) if raw else default_alpha
        except ValueError:
            alpha = default_alpha
    data = RunData(ns=ns, alpha=alpha, history=_read_history(client, keys.history))
    status: list[str] = []
    answers: list[int] = []
    for _, raw in _scan_hash(client, keys.assign):
        try:
            rec = _unpack(raw)
        except (ValueError, msgpack.UnpackException, TypeError):
            continue
        status.append(_s(rec.get("status", "")))
        answers.append(int(rec.get("answers", 0) or 0))
        data.revisions += int(rec.get("rev", 0) or 0)
        data.pinned += bool(rec.get("pinned"))
    data.status = np.asarray(status, dtype=object)
    data.answers = np.asarray(answers, dtype=np.int64)
    for src, raw in _scan_hash(client, keys.noise):
        try:
            rec = _unpack(raw)
            data.sources.append({"source": src, "delta": float(rec["delta"]),
                                 "se": float(rec.get("se", float("nan"))),
                                 "answers": int(rec.get("answers", 0))})
        except (ValueError, KeyError, TypeError, msgpack.UnpackException):
            continue
    if not data.sources:
        from_state = _from_committed_state(client, keys)
        if from_state is not None:
            data.sources, state_alpha = from_state
            if alpha_given is None and not meta_alpha:
                data.alpha = state_alpha
    data.sources.sort(key=lambda s: -s["answers"])
    return data


def _from_committed_state(client: Any, keys: Keys) -> tuple[list[dict[str, Any]], float] | None:
    """Learned sources and alpha from the worker's snapshot and journal, when no
    ``{NS}:noise`` hash was written: the same read-only path a restarting worker takes.
    Any failure (no state, a format this version cannot read) just leaves the plot empty.
    """
    try:
        from ..stream.recovery import replay_journal
        from ..stream.state import DEFAULT_AID_WINDOW, WorkerState

        epoch, snap = client.get(keys.epoch), client.get(keys.snapshot)
        if epoch is None or snap is None:
            return None
        state = WorkerState.from_snapshot(snap, _s(epoch), DEFAULT_AID_WINDOW)
        replay_journal(client, keys, state)
        rows = [{"source": str(r["source"]), "delta": float(r["delta"]),
                 "se": float(r.get("se", float("nan"))), "answers": int(r["answers"])}
                for r in state.engine.sources()]
        return rows, float(state.engine.config.alpha)
    except Exception:  # noqa: BLE001 - a report without this plot beats no report
        return None


def per_item_limit(data: RunData) -> float | None:
    """E[N] per item of the SPRT that knows each source's learned delta (None if unknown).

    One source: the gambler's-ruin closed form. Several: the core's walk over sources drawn
    in proportion to the answers each gave (a reliably wrong source counts flipped).
    """
    srcs = [s for s in data.sources if s["answers"] > 0 and math.isfinite(s["delta"])]
    if not srcs or not any(abs(s["delta"]) > 1e-6 for s in srcs):
        return None
    if len(srcs) == 1:
        return ruin_expected_length(data.alpha, min(abs(srcs[0]["delta"]), 0.999))
    total = sum(s["answers"] for s in srcs)
    d = np.clip([s["delta"] for s in srcs], -0.999, 0.999)
    share = np.array([s["answers"] for s in srcs], dtype=float) / total
    # Wald's approximation E[N] ~ A / E[step]; a near-random crowd would make the exact walk
    # crawl, and its answer is then only "very many" anyway.
    drift = float(np.sum(share * d * weight(d)))
    wald = threshold(data.alpha) * (1 - 2 * data.alpha) / drift if drift > 0 else math.inf
    if wald > 2000:
        return wald if math.isfinite(wald) else None
    pool: list[float] = []
    for s in srcs:
        pool += [float(np.clip(s["delta"], -0.999, 0.999))] * max(1, round(200 * s["answers"]
                                                                           / total))
    return mixed_limit(pool, data.alpha, walks=20_000, seed=0,
                       max_steps=100_000).mean_length


