"""Parsing and showing times and durations, shared by the command line, alerts and dashboard."""

from __future__ import annotations

import math
from datetime import UTC, datetime


def parse_time(text: str) -> float:
    """Epoch seconds from epoch seconds or ISO 8601 / RFC 3339 with a zone (or ``Z``).

    Raises ValueError with a short reason a person can act on.
    """
    s = text.strip()
    if not s:
        raise ValueError("empty time")
    try:
        value = float(s)
    except ValueError:
        pass
    else:
        if not math.isfinite(value):
            raise ValueError(f"time is not finite: {s!r}")
        return value
    try:
        dt = datetime.fromisoformat(s.replace("z", "Z"))
    except ValueError:
        raise ValueError(f"unparseable time {s!r} (want epoch seconds or RFC 3339)") from None
    if dt.tzinfo is None:
        raise ValueError(f"time {s!r} has no zone (add Z or an offset such as +01:00)")
    return dt.timestamp()


def human_duration(seconds: float | None) -> str:
    """'42 min', '3 h 05 min', '2 d 4 h'; '-' for None."""
    if seconds is None or not math.isfinite(seconds):
        return "-"
    s = max(0.0, float(seconds))
    if s < 90:
        return f"{s:.0f} s"
    m = s / 60.0
    if m < 90:
        return f"{m:.0f} min"
    h, m = divmod(int(round(m)), 60)
    if h < 48:
        return f"{h} h {m:02d} min"
    d, h = divmod(h, 24)
    return f"{d} d {h} h"


def local_clock(epoch_s: float | None, with_date: bool = False) -> str:
    """A local wall-clock time for people: '14:05' or '2026-12-01 14:05'."""
    if epoch_s is None or not math.isfinite(epoch_s):
        return "-"
    dt = datetime.fromtimestamp(epoch_s, tz=UTC).astimezone()
    return dt.strftime("%Y-%m-%d %H:%M %Z" if with_date else "%H:%M")
