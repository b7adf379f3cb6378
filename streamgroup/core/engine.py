"""The placement engine: the one object the stream layer drives.

API (stable; the stream layer, the demo and the benchmarks code against it):

- ``Engine(config)``: constructors only store.
- ``validate_item(key, side) -> str | None`` and ``validate_answer(answer) -> str | None``:
  a human-readable reason the input would be rejected, or None. Nothing is applied.
- ``add_items([(key, side_or_None), ...]) -> list[str]``: ``"applied"`` or ``"duplicate"``
  per item. Raises :class:`EngineInputError` (and applies nothing) if any item is bad.
- ``add_answers([Answer, ...], now_ms) -> list[str]``: ``"applied"`` or ``"duplicate"`` per
  answer (a repeated qid or a repeated (pair, source) is a duplicate). Unknown item keys
  are registered as ``waiting`` items. Raises :class:`EngineInputError`, applying nothing,
  if any answer is bad.
- ``plan(now_ms) -> list[Question]``: the questions to send now.
- ``take_changes() -> list[Record]``: records that changed since the last call.
- ``record(key) -> Record | None``; ``stats() -> dict``; ``sources() -> list[dict]``;
  ``done() -> bool``.
- ``snapshot() -> bytes`` and ``Engine.restore(data) -> Engine``: a restored engine behaves
  exactly like the original (same future questions, qids and decisions).
"""
