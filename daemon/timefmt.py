"""Times and durations as people read them: one format for the log, the alerts, the mail, the
dashboard, ``thermeta status`` and the demo.

    duration(2520)              '42 min'       (whole minutes; 'under 1 min' below 30 s)
    duration(11100)             '3 h 05 min'   (hours and minutes up to 48 h)
    duration(200000)            '2 d 7 h'      (days and hours beyond)
    span(2100, 3000)            '35 to 50 min' (an interval; its ends share their unit word)
    span(2500, 2530)            '42 min'       (ends that round together are one value)
    span(240, None)             '4 min or later'  (an open end says so in words)
    clock(t)                    '14:05 CET', or '2026-12-05 14:05 CET' on another day

Clock times are in the site's zone: the config's ``timezone`` (``use_zone``), else the
machine's.  A ``by`` deadline such as "16:30" is read in the same zone (``zone()``).
"""

from __future__ import annotations

import math
from datetime import UTC, datetime, timedelta, tzinfo
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

_ZONE: tzinfo | None = None  # None: the machine's own zone
OPEN_END = "or later"  # the words after an interval's early end when it has no late end


def use_zone(name: str | None) -> None:
    """Show and read clock times in the IANA zone ``name`` (None: the machine's zone).

    Raises ValueError naming the zone when it is not known."""
    global _ZONE
    if name is None:
        _ZONE = None
        return
    _ZONE = zone_named(name)


def zone_named(name: str) -> tzinfo:
    """The IANA zone ``name`` ('Europe/Amsterdam', 'UTC'); ValueError when there is none."""
    try:
        return ZoneInfo(name)
    except (ZoneInfoNotFoundError, ValueError):
        raise ValueError(
            f"unknown time zone {name!r} (want an IANA name such as Europe/Amsterdam or UTC)"
        ) from None


def zone() -> tzinfo:
    """The zone clock times are shown and read in."""
    if _ZONE is not None:
        return _ZONE
    local = datetime.now(UTC).astimezone().tzinfo
    return local if local is not None else UTC


def local(epoch_s: float) -> datetime:
    """``epoch_s`` as an aware datetime in the site's zone."""
    return datetime.fromtimestamp(epoch_s, tz=UTC).astimezone(zone())


def _minute(epoch_s: float) -> datetime:
    """``epoch_s`` to the nearest minute, in the site's zone: a clock time agrees with the
    duration beside it, which is rounded to whole minutes too."""
    return local(round(epoch_s / 60.0) * 60.0)


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


def parse_since(text: str, *, end: bool = False) -> float:
    """Like :func:`parse_time`, and a bare date ('2026-12-03') is the start of that day in the
    site's zone (with ``end``, the end of it: the next day's start)."""
    s = text.strip()
    if len(s) == 10 and s[4] == "-" and s[7] == "-":
        try:
            day = datetime.strptime(s, "%Y-%m-%d")
        except ValueError:
            raise ValueError(f"unparseable date {s!r} (want YYYY-MM-DD)") from None
        if end:
            day += timedelta(days=1)
        return day.replace(tzinfo=zone()).timestamp()
    return parse_time(s)


def duration(seconds: float | None) -> str:
    """'42 min', '3 h 05 min', '2 d 7 h'; 'under 1 min' below half a minute; '-' for None."""
    if seconds is None or not math.isfinite(seconds):
        return "-"
    minutes = int(round(max(0.0, float(seconds)) / 60.0))
    if minutes == 0:
        return "under 1 min"
    if minutes < 60:
        return f"{minutes} min"
    h, m = divmod(minutes, 60)
    if h < 48:
        return f"{h} h {m:02d} min"
    d, h = divmod(int(round(seconds / 3600.0)), 24)
    return f"{d} d {h} h"


def span(lo: float | None, hi: float | None) -> str:
    """A 90 % interval of a time left: '35 to 50 min', '50 min to 3 h 05 min', '42 min' when
    its ends round together, '4 min or later' when it has no late end; '-' when it has no
    early end either."""
    if lo is None or not math.isfinite(lo):
        return "-" if hi is None else f"by {duration(hi)}"
    a = duration(lo)
    if hi is None or not math.isfinite(hi):
        return f"{a} {OPEN_END}"
    b = duration(hi)
    if a == b:
        return a
    if a.endswith(" min") and b.endswith(" min") and " h " not in a + b and a[0].isdigit():
        return f"{a[: -len(' min')]} to {b}"
    return f"{a} to {b}"


# beyond this an epoch time is no clock time (datetime ends in the year 9999; an open end of a
# forecast's interval can be far past that)
LATEST_S = 2.5e11


def clock(epoch_s: float | None, now_s: float | None = None) -> str:
    """'14:05 CET' in the site's zone; with the date when it is not the day of ``now_s``
    (default: the wall clock's)."""
    if epoch_s is None or not abs(epoch_s) < LATEST_S:
        return "-"
    dt = _minute(epoch_s)
    today = local(now_s if now_s is not None else datetime.now(UTC).timestamp()).date()
    return dt.strftime("%H:%M %Z" if dt.date() == today else "%Y-%m-%d %H:%M %Z")


def clock_span(lo_s: float | None, hi_s: float | None, now_s: float | None = None) -> str:
    """Two clock times of an interval: '13:50 to 14:31 CET', '13:50 CET' when they show alike,
    'from 13:50 CET, no later bound'."""
    if lo_s is None:
        return "-"
    a = clock(lo_s, now_s)
    if hi_s is None:
        return f"from {a}, no later bound"
    b = clock(hi_s, now_s)
    if a == b:
        return a
    zone_a, zone_b = a.rsplit(" ", 1)[-1], b.rsplit(" ", 1)[-1]
    if zone_a == zone_b and len(a) == len(b) == len("14:05 ") + len(zone_a):
        return f"{a[: -len(zone_a) - 1]} to {b}"
    return f"{a} to {b}"


def local_clock(epoch_s: float | None, with_date: bool = False) -> str:
    """A wall-clock time in the site's zone: '14:05' or '2026-12-01 14:05 CET'."""
    if epoch_s is None or not abs(epoch_s) < LATEST_S:
        return "-"
    return _minute(epoch_s).strftime("%Y-%m-%d %H:%M %Z" if with_date else "%H:%M")
