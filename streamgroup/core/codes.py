"""Small integer codes and tunables shared by the engine's modules."""

from __future__ import annotations

from ..keys import (
    STATUS_ASKING,
    STATUS_PLACED,
    STATUS_UNRESOLVED,
    STATUS_WAITING,
    WHY_CHECK,
    WHY_PLACE,
    WHY_SEED,
)

STATUS_NAMES = (STATUS_WAITING, STATUS_ASKING, STATUS_PLACED, STATUS_UNRESOLVED)
WAITING, ASKING, PLACED, UNRESOLVED = range(4)
WHY_NAMES = (WHY_SEED, WHY_PLACE, WHY_CHECK)
SEED, PLACE, CHECK = range(3)
Q_OPEN, Q_ANSWERED, Q_EXPIRED = range(3)

ANCHOR_FACTOR = 0.01  # an item joins the reference pool when its error is <= alpha * this
BLOCK_START = 16  # first bootstrap block size
BLOCK_MAX = 800  # the block stops growing here
MIN_ANCHORS = 8  # reference members needed before placing the other items
REFIT_GROWTH = 0.35  # re-learn the sources when counted answers grew by this fraction
REFIT_MIN = 200
