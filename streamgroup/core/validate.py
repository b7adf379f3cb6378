"""Checks of the values handed to the engine; each returns a reason or None."""

from __future__ import annotations

import math
from typing import Any

from ..keys import CONTROL_CHARS, MAX_ID_BYTES, MAX_KEY_BYTES, MAX_LABEL_BYTES, MAX_SOURCE_BYTES


def _text(value: Any, what: str, limit: int, allow_empty: bool = False) -> str | None:
    if not isinstance(value, str):
        return f"{what} must be text, got {type(value).__name__}"
    if value.isascii() and value.isprintable():  # the common case, checked at C speed
        if not value and not allow_empty:
            return f"{what} is empty"
        if len(value) > limit:
            return f"{what} is {len(value)} bytes, over the limit of {limit}"
        return None
    size = len(value.encode("utf-8", "surrogatepass"))
    if size == 0 and not allow_empty:
        return f"{what} is empty"
    if size > limit:
        return f"{what} is {size} bytes, over the limit of {limit}"
    try:
        value.encode("utf-8")
    except UnicodeEncodeError:
        return f"{what} is not valid UTF-8"
    if CONTROL_CHARS.search(value):
        return f"{what} contains control characters"
    return None


def item_key(value: Any, what: str = "item key") -> str | None:
    return _text(value, what, MAX_KEY_BYTES)


def source_id(value: Any) -> str | None:
    return _text(value, "source", MAX_SOURCE_BYTES, allow_empty=True)


def side_label(value: Any) -> str | None:
    return _text(value, "side label", MAX_LABEL_BYTES)


def qid(value: Any) -> str | None:
    err = _text(value, "qid", MAX_ID_BYTES)
    if err is None and not value.isdigit():
        return f"qid {value!r} is not one this worker issued"
    return err


def same_flag(value: Any) -> str | None:
    if isinstance(value, bool):
        return None
    if isinstance(value, int) and value in (0, 1):
        return None
    if isinstance(value, float) and math.isnan(value):
        return "same is NaN; it must be 1 or 0"
    return f"same must be 1 or 0 (or a boolean), got {value!r}"
