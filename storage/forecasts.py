"""Which refits' forecasts the history keeps.

Every refit overwrites the item's row in ``current_forecasts`` (what status, the dashboard and a
restarted service read).  The history (``forecasts``) keeps a forecast only when it says
something the item's newest kept one did not:

- a word changed: the item's state, whether there is a forecast and why not, the level in focus,
  a level's state, the episode;
- a time moved: a crossing time (``made_at + eta_s``) or an interval bound, of the item or of a
  level, appeared, vanished or moved by more than :data:`SHIFT_S` or :data:`SHIFT_FRACTION` of
  the time still ahead of it, whichever is more;
- or :data:`KEEP_EVERY_S` passed since the newest kept one, so a steady item's record still
  shows what was forecast along the way.

A probe refitted every minute whose forecast holds writes one row an hour instead of sixty
(a forecast row is about 1.4 KB, some 35 readings' worth).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

KEEP_EVERY_S = 3600.0
SHIFT_S = 120.0
SHIFT_FRACTION = 0.1
TIME_KEYS = ("eta_s", "eta_lo_s", "eta_hi_s")


@dataclass(frozen=True)
class Said:
    """What one forecast says, in the terms the history compares: words and absolute times."""

    made_at: float
    words: tuple[Any, ...]
    times: tuple[float | None, ...]


def _at(made_at: float, doc: dict[str, Any], key: str) -> float | None:
    value = doc.get(key)
    if not isinstance(value, int | float) or not math.isfinite(value):
        return None
    return made_at + float(value)


def said(made_at: float, body: dict[str, Any]) -> Said:
    """The words and crossing times of a forecast JSON made at ``made_at`` (epoch s)."""
    levels = [d for d in body.get("levels") or [] if isinstance(d, dict)]
    episode = body.get("episode")
    words = (
        body.get("state"),
        body.get("ok"),
        body.get("reason_code"),
        body.get("focus"),
        episode.get("id") if isinstance(episode, dict) else None,
        tuple((d.get("name"), d.get("state")) for d in levels),
    )
    times = tuple(_at(made_at, doc, k) for doc in [body, *levels] for k in TIME_KEYS)
    return Said(made_at, words, times)


def says_new(kept: Said | None, now: Said) -> bool:
    """Whether ``now`` belongs in the history after ``kept`` (the item's newest kept one)."""
    if kept is None or now.words != kept.words or len(now.times) != len(kept.times):
        return True
    if now.made_at - kept.made_at >= KEEP_EVERY_S:
        return True
    for a, b in zip(now.times, kept.times):
        if (a is None) != (b is None):
            return True
        if a is not None and b is not None:
            ahead = max(0.0, a - now.made_at)
            if abs(a - b) > max(SHIFT_S, SHIFT_FRACTION * ahead):
                return True
    return False
