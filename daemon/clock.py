"""The daemon's sense of "now", injectable so tests and the demo can run simulated time.

Every part of the service that needs the time (receipt stamps, refit times, the future-timestamp
check) asks the one clock it was given.  ``rate`` is simulated seconds per real second: the
scheduler divides its intervals by it.

Durations the service measures itself (how long an item has been silent) use the clock's
``monotonic()`` instead (:func:`monotonic_of`): the wall clock may be stepped (NTP, an operator,
a VM resumed) and a step must neither freeze nor fire anything.  A simulated clock runs on
``time.monotonic`` already, so its ``now()`` serves.
"""

from __future__ import annotations

import threading
import time
from typing import Protocol


class Clock(Protocol):
    rate: float

    def now(self) -> float:
        """Epoch seconds (UTC)."""
        ...


class SystemClock:
    """The wall clock."""

    rate = 1.0

    def now(self) -> float:
        return time.time()

    def monotonic(self) -> float:
        return time.monotonic()


def monotonic_of(clock: Clock) -> float:
    """Seconds on ``clock``'s monotonic scale (its ``monotonic()``, else its ``now()``, which a
    simulated clock keeps monotonic)."""
    mono = getattr(clock, "monotonic", None)
    return float(mono()) if mono is not None else float(clock.now())


class ScaledClock:
    """Simulated time that starts at ``start_epoch_s`` and runs ``rate`` times faster than real."""

    def __init__(self, start_epoch_s: float | None = None, rate: float = 1.0):
        if not rate > 0:
            raise ValueError(f"rate must be > 0, got {rate!r}")
        self.rate = float(rate)
        self._start = time.time() if start_epoch_s is None else float(start_epoch_s)
        self._m0 = time.monotonic()

    def now(self) -> float:
        # now = start + (monotonic elapsed) * rate
        return self._start + (time.monotonic() - self._m0) * self.rate


class ManualClock:
    """A clock that moves only when told (unit tests)."""

    rate = 1.0

    def __init__(self, t: float = 1_800_000_000.0):
        self._t = float(t)
        self._lock = threading.Lock()

    def now(self) -> float:
        with self._lock:
            return self._t

    def set(self, t: float) -> None:
        with self._lock:
            self._t = float(t)

    def advance(self, dt_s: float) -> None:
        with self._lock:
            self._t += float(dt_s)
