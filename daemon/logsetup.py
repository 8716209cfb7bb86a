"""Logging for the daemon: readable lines by default, JSON lines with ``--log-json``.

A failing store is one condition however many places meet it (every item's refit, the heartbeat,
the writer's retries): :class:`ConditionThrottle` lets one line per condition through every
``CONDITION_EVERY_S`` seconds, without a traceback, saying how many it held back.
"""

from __future__ import annotations

import json
import logging
import sys
import threading
import time
from datetime import UTC, datetime

from thermeta.storage.errors import StoreError, StoreRefused

CONDITION_EVERY_S = 300.0

LEVELS = {
    "debug": logging.DEBUG,
    "info": logging.INFO,
    "warning": logging.WARNING,
    "error": logging.ERROR,
}


class JsonFormatter(logging.Formatter):
    """One JSON object per line: time (RFC 3339 UTC), level, logger, message, exception."""

    def format(self, record: logging.LogRecord) -> str:
        out = {
            "time": datetime.fromtimestamp(record.created, tz=UTC)
            .isoformat(timespec="milliseconds")
            .replace("+00:00", "Z"),
            "level": record.levelname.lower(),
            "logger": record.name,
            "message": record.getMessage(),
        }
        if record.exc_info:
            out["exception"] = self.formatException(record.exc_info)
        return json.dumps(out)


def _store_error(record: logging.LogRecord) -> StoreError | None:
    """The store failure a record reports (in its exception or its arguments), if any."""
    found: list[object] = []
    if record.exc_info and record.exc_info[1] is not None:
        found.append(record.exc_info[1])
    if isinstance(record.args, tuple):
        found.extend(record.args)
    for exc in found:
        if isinstance(exc, StoreError) and not isinstance(exc, StoreRefused):
            return exc
    return None


class ConditionThrottle(logging.Filter):
    """One line per condition (now: "the store fails") per ``every_s``; the rest are counted."""

    def __init__(self, every_s: float = CONDITION_EVERY_S):
        super().__init__()
        self.every_s = every_s
        self._last: dict[str, float] = {}
        self._held: dict[str, int] = {}
        self._lock = threading.Lock()

    def filter(self, record: logging.LogRecord) -> bool:
        exc = _store_error(record)
        if exc is None:
            return True
        key = "store"
        now = time.monotonic()
        with self._lock:
            last = self._last.get(key)
            if last is not None and now - last < self.every_s:
                self._held[key] = self._held.get(key, 0) + 1
                return False
            held = self._held.pop(key, 0)
            self._last[key] = now
        text = record.getMessage()
        if str(exc) not in text:
            text = f"{text}: {exc}"
        if held:
            text += f" ({held} more store failure(s) not shown since the last such line)"
        record.msg = f"{text}; such lines repeat at most every {self.every_s:g} s"
        record.args = None
        record.exc_info = None
        record.exc_text = None
        return True


class SiteFormatter(logging.Formatter):
    """Text lines stamped in the site's zone (the config's ``timezone``), with its name, as the
    alerts and the dashboard show their clock times."""

    def formatTime(self, record: logging.LogRecord, datefmt: str | None = None) -> str:
        from thermeta.daemon.timefmt import local

        return local(record.created).strftime("%Y-%m-%d %H:%M:%S %Z")


def configure(level: str = "info", json_lines: bool = False, stream=None) -> None:
    """Route thermeta's (and paho's, APScheduler's) logs to ``stream`` (stderr by default)."""
    handler = logging.StreamHandler(stream or sys.stderr)
    if json_lines:
        handler.setFormatter(JsonFormatter())
    else:
        handler.setFormatter(SiteFormatter("%(asctime)s %(levelname)-7s %(name)s: %(message)s"))
    handler.addFilter(ConditionThrottle())
    root = logging.getLogger()
    for h in list(root.handlers):
        root.removeHandler(h)
    root.addHandler(handler)
    root.setLevel(LEVELS.get(level, logging.INFO))
    # paho's per-packet chatter only at debug
    logging.getLogger("thermeta.mqtt.paho").setLevel(
        logging.DEBUG if level == "debug" else logging.WARNING
    )
    # APScheduler's own warnings (a run skipped while the last goes on) are said by the service
    # once per few minutes with a count; its errors still come through.
    logging.getLogger("apscheduler").setLevel(logging.ERROR if level != "debug" else logging.DEBUG)
