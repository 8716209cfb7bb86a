"""An item's defrost signal: what a refrigeration controller publishes when its coil defrosts.

The controller publishes the defrost state on the item's ``defrost_topic`` (on at the start, off
at the end; repeating the current state is fine).  The writer stores each message as a reading
of the series ``<item>.defrost`` with value 1 (on) or 0 (off), so the store keeps the history
like any probe's; the refitter turns the newest stretch into the forecast's ``"defrost"`` field
and the alert rules hold new alerts through it (``daemon/alerts/rules.py``).

Accepted payloads: ``on``/``off``, ``true``/``false``, ``1``/``0`` (any case, bare or as a JSON
string, number or boolean), or a JSON object ``{"defrost": <one of those>, "ts": epoch seconds
or RFC 3339}`` (``"value"`` may stand for ``"defrost"``; ``ts`` optional).
"""

from __future__ import annotations

import json
import math
from collections.abc import Sequence
from typing import Any

from thermeta.daemon.ingest.payloads import (
    DEFAULT_LIMITS,
    EPOCH_MAX_S,
    EPOCH_MIN_S,
    Limits,
    Reading,
)
from thermeta.daemon.timefmt import parse_time
from thermeta.predictors.result import rfc3339
from thermeta.storage.errors import PayloadError

ON_WORDS = {"on": 1.0, "true": 1.0, "1": 1.0, "off": 0.0, "false": 0.0, "0": 0.0}


def _state(v: Any) -> float:
    if isinstance(v, bool):
        return 1.0 if v else 0.0
    if isinstance(v, (int, float)) and v in (0, 1):
        return float(v)
    if isinstance(v, str) and v.strip().lower() in ON_WORDS:
        return ON_WORDS[v.strip().lower()]
    raise PayloadError(f"defrost state must be on/off, true/false or 1/0, got {str(v)[:40]!r}")


def _ts(v: Any, now: float, limits: Limits) -> tuple[float, bool]:
    if v is None:
        return now, True
    if isinstance(v, (int, float)) and not isinstance(v, bool):
        try:
            ts = float(v)
        except OverflowError:
            raise PayloadError("defrost ts out of range") from None
    elif isinstance(v, str):
        try:
            ts = parse_time(v)
        except ValueError:
            raise PayloadError(f"defrost ts is not a time: {v[:40]!r}") from None
    else:
        raise PayloadError("defrost ts must be epoch seconds or RFC 3339")
    if not (math.isfinite(ts) and EPOCH_MIN_S <= ts <= EPOCH_MAX_S):
        raise PayloadError(f"defrost ts out of range: {ts!r}")
    if ts > now + limits.max_future_s:
        raise PayloadError(f"defrost ts {ts - now:.0f} s in the future")
    return ts, False


def parse_defrost(payload: bytes, now: float, limits: Limits = DEFAULT_LIMITS) -> list[Reading]:
    """The defrost state in ``payload`` (received at ``now``) as one reading of 1 or 0.

    Raises PayloadError with a short reason (the dead-letter reason) when it holds no state."""
    if len(payload) > limits.max_bytes:
        raise PayloadError(f"oversized payload ({len(payload)} bytes > {limits.max_bytes})")
    try:
        text = payload.decode("utf-8").strip()
    except UnicodeDecodeError:
        raise PayloadError("defrost payload is not UTF-8 text") from None
    doc: Any = text
    if text[:1] in ("{", "[", '"') or text in ("true", "false"):
        try:
            doc = json.loads(text)
        except (ValueError, RecursionError):
            raise PayloadError("defrost payload is not valid JSON") from None
    ts_raw = None
    if isinstance(doc, dict):
        key = "defrost" if "defrost" in doc else "value"
        if key not in doc:
            raise PayloadError('defrost object needs a "defrost" (or "value") key')
        doc, ts_raw = doc[key], doc.get("ts")
    ts, receipt = _ts(ts_raw, now, limits)
    return [Reading(ts=ts, value_c=_state(doc), receipt_ts=receipt)]


def defrost_status(rows: Sequence[tuple[float, float]]) -> dict[str, Any] | None:
    """The newest defrost in a signal's (ts, 1|0) rows, oldest first: when it started (the first
    'on' after the last 'off' before it, or the first row) and ended (None while it is on).
    None when the rows hold no 'on'."""
    start_i = None
    for i in range(len(rows) - 1, -1, -1):
        if rows[i][1] >= 0.5 and (i == 0 or rows[i - 1][1] < 0.5):
            start_i = i
            break
    if start_i is None:
        return None
    end = next((t for t, v in rows[start_i + 1 :] if v < 0.5), None)
    return {
        "on": end is None,
        "started_at": rfc3339(rows[start_i][0]),
        "ended_at": None if end is None else rfc3339(end),
    }
