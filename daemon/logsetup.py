"""Logging for the daemon: readable lines by default, JSON lines with ``--log-json``."""

from __future__ import annotations

import json
import logging
import sys
from datetime import UTC, datetime

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
    root = logging.getLogger()
    for h in list(root.handlers):
        root.removeHandler(h)
    root.addHandler(handler)
    root.setLevel(LEVELS.get(level, logging.INFO))
    # paho's per-packet chatter only at debug
    logging.getLogger("thermeta.mqtt.paho").setLevel(
        logging.DEBUG if level == "debug" else logging.WARNING
    )
    logging.getLogger("apscheduler").setLevel(
        logging.WARNING if level != "debug" else logging.DEBUG
    )
