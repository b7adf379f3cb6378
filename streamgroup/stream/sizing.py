"""How many entries the worker asks for per read: sized by the time its commits hold Redis.

Redis runs one command at a time, and a batch's MULTI/EXEC is one command: a lookup that
arrives meanwhile waits until it ends. Larger batches cost the worker less per entry (its
fixed cost per batch is spread thinner), so the worker reads as many entries as keeps its
transactions near ``hold_ms`` of Redis's own time. Each timed transaction starts and ends
with ``TIME`` (``commit.build_commit(timed=True)``), so what is measured is Redis's time
inside EXEC, whatever the worker's own scheduling; the mean time per entry of recent
near-full batches (smoothed) then gives the count. Redis's time grows with the entries
of a batch plus a small fixed part, so the count settles where a transaction takes
``hold_ms``: on a fast host, long batches; on a slow one, short ones.

Pure: no clock and no I/O; the worker feeds it what the replies said.
"""

from __future__ import annotations

LEAST = 100  # entries per read at the least (or `batch`, if that is smaller)
SMOOTHING = 0.2  # weight of the newest batch in the running time per entry
NEAR_FULL = 0.5  # a batch with fewer entries than this share of the count is not used


class ReadSizer:
    """The count of the next XREADGROUP, between ``min(most, LEAST)`` and ``most``.

    ``hold_ms`` 0 turns the sizing off: every read asks for ``most``. A ``most`` at or below
    ``LEAST`` is never changed either, so small fixed batches (the crash and fault tests
    compare batch cuts between runs) stay exactly as configured.
    """

    def __init__(self, most: int, hold_ms: float) -> None:
        if most < 1:
            raise ValueError(f"most must be at least 1 (got {most})")
        if hold_ms < 0:
            raise ValueError(f"hold_ms must be 0 (off) or positive (got {hold_ms})")
        self.most = most
        self.least = min(most, LEAST)
        self.hold_us = hold_ms * 1000.0
        self.count = self.least if hold_ms > 0 else most
        self.us_per_entry: float | None = None  # smoothed Redis time per entry

    @property
    def fixed(self) -> bool:
        return self.hold_us == 0 or self.least == self.most

    def observe(self, entries: int, held_us: float | None) -> None:
        """Take the Redis time of one committed batch of ``entries`` entries."""
        if self.fixed or held_us is None or held_us < 0 or entries < 1:
            return
        if entries < NEAR_FULL * self.count:
            return  # a short batch (the input ran dry): its fixed part would weigh too much
        per = held_us / entries
        prev = self.us_per_entry
        self.us_per_entry = per if prev is None else prev + SMOOTHING * (per - prev)
        if self.us_per_entry <= 0:
            self.count = self.most
            return
        self.count = max(self.least, min(self.most, int(self.hold_us / self.us_per_entry)))
