"""``streamgroup report``: one self-contained HTML page about a run, read from Redis.

Four plots, drawn with matplotlib (Agg, no display) and embedded as base64 PNG so the page
can be mailed or archived with no external asset: items placed and pending over time
(``{NS}:history``), spend against the per-item limit, answers per item (``{NS}:assign``),
and the learned reliability of each source (``{NS}:noise``). Reading is read-only: the
report never writes to Redis.
"""

from __future__ import annotations

from .data import RunData, per_item_limit, read_run
from .page import build_report, render_html

__all__ = ["RunData", "build_report", "per_item_limit", "read_run", "render_html"]
