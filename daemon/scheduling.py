"""Keep APScheduler's jobs on time when the wall clock is stepped.

APScheduler 3 times its jobs by the wall clock: it sleeps "next run minus ``datetime.now()``".
After the clock is stepped back by an hour every job waits an extra hour (refits, alerts, the
heartbeat, retention all stop); stepped forward, every job is overdue at once and runs (once:
jobs coalesce), after which its interval grid carries on from the new time.

:class:`StepWatch` compares the wall clock with ``time.monotonic()`` every second.  When their
difference moves by more than ``tolerance_s`` the clock was stepped: it logs the step once and,
for a step back, moves every job's next run by the same amount, so the jobs keep the cadence
they had on the monotonic clock.  (A forward step needs nothing beyond the log line.)
"""

from __future__ import annotations

import logging
import threading
import time
from datetime import timedelta
from typing import Any

log = logging.getLogger("thermeta.schedule")

CHECK_EVERY_S = 1.0
TOLERANCE_S = 2.0


class StepWatch(threading.Thread):
    """Watches for steps of the wall clock and keeps ``scheduler``'s jobs on monotonic time."""

    def __init__(
        self, scheduler: Any, check_every_s: float = CHECK_EVERY_S, tolerance_s: float = TOLERANCE_S
    ):
        super().__init__(name="thermeta-clock-steps", daemon=True)
        self.scheduler = scheduler
        self.check_every_s = check_every_s
        self.tolerance_s = tolerance_s
        self.steps = 0
        self._stop = threading.Event()
        self._offset = self._now_offset()

    @staticmethod
    def _now_offset() -> float:
        return time.time() - time.monotonic()

    def stop(self) -> None:
        self._stop.set()

    def run(self) -> None:
        while not self._stop.wait(self.check_every_s):
            try:
                self.check()
            except Exception:  # noqa: BLE001 - the watch must go on
                log.exception("checking the wall clock failed")

    def check(self) -> float:
        """Look once; returns the step found (seconds, 0.0 for none)."""
        offset = self._now_offset()
        step = offset - self._offset
        self._offset = offset
        if abs(step) <= self.tolerance_s:
            return 0.0
        self.steps += 1
        log.warning(
            "the wall clock was stepped %s by %.0f s; scheduled work keeps its pace",
            "back" if step < 0 else "forward",
            abs(step),
        )
        if step < 0:
            for job in self.scheduler.get_jobs():
                if job.next_run_time is not None:
                    job.modify(next_run_time=job.next_run_time + timedelta(seconds=step))
        return step
