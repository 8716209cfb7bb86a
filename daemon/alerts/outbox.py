"""The outbox worker: one thread per hook, delivering that hook's pending alerts in order.

A failed delivery stays pending; the worker waits ``base_s * 2**(n-1)`` seconds (capped at
``max_s``, with a little jitter) after the n-th failure in a row, then tries the oldest pending
alert again, so a hook that was down for an hour gets everything, in order, when it returns.
A row is marked delivered only after the hook returned; a restart picks up whatever is pending.
(A crash between the hook's success and that mark can repeat one alert; each carries its ``id``
for receivers that deduplicate.)  Alerts older than ``max_age_s`` are given up and marked failed.
"""

from __future__ import annotations

import logging
import random
import threading
import time
from typing import Any

from thermeta.storage.errors import DeliveryError

log = logging.getLogger("thermeta.alerts.outbox")

POLL_S = 2.0
# shared outbox: how long a claimed row waits for its sender before others may take it (longer
# than any hook's own timeout)
CLAIM_HOLD_S = 120.0
WARN_EVERY_S = 300.0


def backoff_s(failures: int, base_s: float, max_s: float) -> float:
    """Delay after ``failures`` failures in a row: base * 2^(failures-1), capped."""
    if failures <= 0:
        return 0.0
    return min(max_s, base_s * 2.0 ** (failures - 1))


class OutboxWorker(threading.Thread):
    def __init__(
        self,
        hook: Any,
        astore: Any,
        *,
        base_s: float = 5.0,
        max_s: float = 300.0,
        max_age_s: float = 7 * 86400.0,
        poll_s: float = POLL_S,
        shared: bool = False,
    ):
        super().__init__(name=f"outbox-{hook.key}", daemon=True)
        self.hook = hook
        self.astore = astore
        self.base_s, self.max_s, self.max_age_s, self.poll_s = base_s, max_s, max_age_s, poll_s
        # [cluster]: other daemons drain the same outbox; each row is claimed before sending
        self.shared = shared
        self.wake = threading.Event()
        self.halt = threading.Event()
        self.failures = 0
        self.delivered = 0
        self.last_error: str | None = None
        self._warned_at = -1e9

    def stop(self, timeout: float = 5.0) -> None:
        self.halt.set()
        self.wake.set()
        self.join(timeout)

    def run(self) -> None:
        while not self.halt.is_set():
            try:
                wait_s = self.drain()
            except Exception:
                log.exception("outbox of %s: unexpected error; retrying", self.hook.key)
                wait_s = self.poll_s
            if self.failures:
                # Backing off: new alerts queue behind the failed one and wait with it, so
                # order holds and a dead hook is not hammered.
                self.halt.wait(wait_s)
            else:
                self.wake.wait(wait_s)
            self.wake.clear()

    def drain(self) -> float:
        """Deliver what is due; return how long to wait before looking again."""
        while not self.halt.is_set():
            now = time.time()
            rows = self._next(now)
            if not rows:
                return self.poll_s
            for row in rows:
                if self.halt.is_set():
                    return 0.0
                if now - row.created_at > self.max_age_s:
                    self.astore.mark_failed_try(
                        row.id, now, "given up: too old", give_up=True, now=now
                    )
                    log.error(
                        "outbox of %s: gave up alert %s after %s",
                        self.hook.key,
                        row.alert["id"],
                        f"{self.max_age_s:g} s",
                    )
                    continue
                try:
                    self.hook.deliver(row.alert)
                except Exception as exc:
                    if not isinstance(exc, DeliveryError):
                        log.exception("hook %s raised unexpectedly", self.hook.key)
                    self.failures += 1
                    delay = backoff_s(self.failures, self.base_s, self.max_s)
                    delay *= 1.0 + 0.1 * random.random()  # spread retries of many hooks
                    self.last_error = str(exc)
                    self.astore.mark_failed_try(row.id, time.time() + delay, str(exc))
                    self._warn(exc, delay)
                    return delay
                self.astore.mark_delivered(row.id, time.time())
                self.delivered += 1
                if self.failures:
                    log.info(
                        "hook %s delivers again after %d failed tries", self.hook.key, self.failures
                    )
                self.failures = 0
                self.last_error = None
        return 0.0

    def _next(self, now: float) -> list[Any]:
        """The rows to send now: the hook's pending ones, or (shared) one claimed row."""
        if not self.shared:
            return list(self.astore.due(self.hook.key))
        row = self.astore.claim(self.hook.key, now, CLAIM_HOLD_S)
        return [] if row is None else [row]

    def _warn(self, exc: Exception, delay: float) -> None:
        now = time.monotonic()
        if now - self._warned_at >= WARN_EVERY_S or self.failures == 1:
            self._warned_at = now
            log.warning(
                "%s (try %d; next in %.0f s; alerts wait in the outbox)", exc, self.failures, delay
            )
