"""Turning an MQTT payload into readings, or a reason to set it aside as a dead letter.

Accepted forms (values in degrees Celsius out, times in epoch seconds UTC):

- a JSON object ``{"ts": epoch seconds or RFC 3339, "value": number, "unit": "C"|"F"|"K"}``
  (``ts`` and ``unit`` optional);
- a bare number such as ``21.4`` (timestamped on receipt and flagged so);
- a SenML pack (RFC 8428): a JSON array of records with ``bn``, ``bt``, ``bu``, ``n``, ``u``,
  ``v``, ``t``; temperature units ``Cel`` and ``K`` (a record with no unit is taken in the item's
  unit; records in other units, such as ``%RH``, are skipped).  Per RFC 8428 sec. 4.5.3, a
  resolved time below 2**28 is relative to now.
"""

from __future__ import annotations

import json
import math
import re
from dataclasses import dataclass
from typing import Any

from thermeta.daemon.timefmt import parse_time
from thermeta.daemon.units import to_celsius
from thermeta.storage.errors import PayloadError

SENML_UNITS = {"Cel": "C", "K": "K"}
SENML_RELATIVE_LIMIT = 2**28  # RFC 8428 sec. 4.5.3
# Reasonable epoch bounds: before 2000 or after 2200 is a unit mix-up (ms vs s), not a reading.
EPOCH_MIN_S = 946_684_800.0
EPOCH_MAX_S = 7_258_118_400.0


@dataclass(frozen=True)
class Reading:
    ts: float
    value_c: float
    receipt_ts: bool  # True when the payload had no time and we stamped it on receipt


@dataclass(frozen=True)
class Limits:
    """Checks per item: the plausible range (degC), how far in the future a time may be, size."""

    low_c: float = -100.0
    high_c: float = 200.0
    max_future_s: float = 300.0
    max_bytes: int = 16384


# Frozen, so one shared instance is a safe default for every parser.
DEFAULT_LIMITS = Limits()


# A bare number: ASCII decimal digits, as JSON writes numbers (a leading + or a trailing point is
# allowed); Python's float() would also take 1_0, ４２ and ٤٢.
ASCII_DECIMAL = re.compile(r"[+-]?(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?", re.ASCII)
ASCII_SPACE = " \t\r\n\f\v"
NOT_FINITE = ("nan", "inf", "infinity")


def parse_payload(
    payload: bytes,
    now: float,
    unit: str = "C",
    limits: Limits = DEFAULT_LIMITS,
    senml_name: str | None = None,
) -> list[Reading]:
    """Readings in ``payload`` (received at ``now``; ``unit`` is the item's default unit).

    Raises PayloadError with a short reason when nothing usable is in it or a value is invalid.
    """
    if len(payload) > limits.max_bytes:
        raise PayloadError(f"oversized payload ({len(payload)} bytes > {limits.max_bytes})")
    if payload[:1] == b"{":
        fast = _fast_object(payload, now, unit, limits)
        if fast is not None:
            return [fast]
    try:
        text = payload.decode("utf-8").strip(ASCII_SPACE)
    except UnicodeDecodeError:
        raise PayloadError("not UTF-8 text") from None
    if not text:
        raise PayloadError("empty payload")
    if text[0] in "[{":
        try:
            doc = json.loads(text, parse_constant=_reject_constant)
        except PayloadError:
            raise
        except json.JSONDecodeError as exc:
            raise PayloadError(f"invalid JSON: {exc.msg}") from None
        except RecursionError:
            raise PayloadError("invalid JSON: too deeply nested") from None
        except ValueError as exc:  # e.g. an integer of more digits than Python converts
            raise PayloadError(f"invalid JSON: {str(exc)[:80]}") from None
        try:
            if isinstance(doc, list):
                out = _senml(doc, now, unit, senml_name)
            else:
                out = [_object(doc, now, unit)]
        except OverflowError:
            raise PayloadError("a number is out of range (beyond a float's)") from None
        except (TypeError, ValueError) as exc:  # a list or object where a name or number goes
            raise PayloadError(f"a field has the wrong type ({str(exc)[:80]})") from None
    else:
        if not ASCII_DECIMAL.fullmatch(text):  # float() also takes 1_0 and other scripts' digits
            if text.lstrip("+-").lower() in NOT_FINITE:
                raise PayloadError("value is not a finite number")
            raise PayloadError("not a number, JSON object or SenML pack")
        value = float(text)
        out = [Reading(now, _finite(value, "value", unit), True)]
    for r in out:
        _check(r, now, limits)
    return out


def _reject_constant(name: str) -> float:
    raise PayloadError(f"value is not a finite number ({name})")


_DECODE = json.JSONDecoder(parse_constant=_reject_constant).decode
_NUMBER = (int, float)


def _fast_object(payload: bytes, now: float, unit: str, limits: Limits) -> Reading | None:
    """:func:`quick_reading` as a :class:`Reading`."""
    quick = quick_reading(payload, now, unit, limits)
    return None if quick is None else Reading(quick[0], quick[1], False)


def quick_reading(
    payload: bytes, now: float, unit: str = "C", limits: Limits = DEFAULT_LIMITS
) -> tuple[float, float] | None:
    """(ts, value in degC) of the common payload ``{"ts": number, "value": number[, "unit":
    ...]}`` when it is that simple and valid, checked quickly (the ingest's hot path: a tuple,
    no object).  None means "not this simple or not valid": :func:`parse_payload` then gives
    the readings or the exact reason."""
    if payload[:1] != b"{" or len(payload) > limits.max_bytes:
        return None
    try:
        doc = _DECODE(payload.decode("utf-8"))
    except (ValueError, PayloadError, RecursionError):  # UnicodeDecodeError, JSONDecodeError
        return None
    if type(doc) is not dict:
        return None
    value: Any = doc.get("value")
    ts: Any = doc.get("ts")
    u = doc.get("unit", unit)
    if type(value) not in _NUMBER or type(ts) not in _NUMBER or u not in ("C", "F", "K"):
        return None
    value_c = value if u == "C" else to_celsius(value, u)
    if not (
        limits.low_c <= value_c <= limits.high_c
        and EPOCH_MIN_S <= ts <= EPOCH_MAX_S
        and ts <= now + limits.max_future_s
    ):
        return None  # NaN and infinities fail the range test too
    return float(ts), float(value_c)


def _finite(value: float, what: str, unit: str) -> float:
    if not math.isfinite(value):
        raise PayloadError(f"{what} is not a finite number")
    return to_celsius(value, unit)


def _number(v: object, what: str) -> float:
    if isinstance(v, bool) or not isinstance(v, (int, float)):
        raise PayloadError(f"{what} must be a number, got {type(v).__name__}")
    return float(v)


def _time(v: object) -> float:
    if isinstance(v, str):
        try:
            return parse_time(v)
        except ValueError as exc:
            raise PayloadError(f"ts: {exc}") from None
    ts = _number(v, "ts")
    if not math.isfinite(ts):
        raise PayloadError("ts is not finite")
    return ts


def _object(doc: object, now: float, unit: str) -> Reading:
    if not isinstance(doc, dict):
        raise PayloadError("JSON must be an object or a SenML array")
    if "value" not in doc:
        raise PayloadError("JSON object has no 'value'")
    value = _number(doc["value"], "value")
    u = doc.get("unit", unit)
    if u not in ("C", "F", "K"):
        raise PayloadError(f"unit must be C, F or K, got {str(u)[:20]!r}")
    if doc.get("ts") is None:
        return Reading(now, _finite(value, "value", u), True)
    return Reading(_time(doc["ts"]), _finite(value, "value", u), False)


def _senml(pack: list, now: float, unit: str, want_name: str | None) -> list[Reading]:
    # Base fields carry forward to later records (RFC 8428 sec. 4.1).
    bn, bt, bu = "", 0.0, None
    out: list[Reading] = []
    seen_values = 0
    for i, rec in enumerate(pack):
        if not isinstance(rec, dict):
            raise PayloadError(f"SenML record {i} is not an object")
        if "bn" in rec:
            if not isinstance(rec["bn"], str):
                raise PayloadError(f"SenML record {i}: bn must be a string")
            bn = rec["bn"]
        if "bt" in rec:
            bt = _number(rec["bt"], f"SenML record {i}: bt")
        if "bu" in rec:
            bu = rec["bu"]
        if "v" not in rec:
            continue
        seen_values += 1
        name = bn + str(rec.get("n", ""))
        if want_name is not None and name != want_name and not name.endswith(want_name):
            continue
        u = rec.get("u", bu)
        if u is None:
            unit_code = unit  # a record without a unit is taken in the item's configured unit
        elif u in SENML_UNITS:
            unit_code = SENML_UNITS[u]
        else:
            continue  # humidity and such beside the temperature: not ours
        value = _number(rec["v"], f"SenML record {i}: v")
        t = bt + _number(rec.get("t", 0.0), f"SenML record {i}: t")
        relative = abs(t) < SENML_RELATIVE_LIMIT
        ts = now + t if relative else t
        out.append(
            Reading(ts, _finite(value, f"SenML record {i}: v", unit_code), relative and t == 0.0)
        )
    if not out:
        raise PayloadError(
            "SenML pack has no temperature record (unit Cel or K)"
            + (f" named {want_name!r}" if want_name and seen_values else "")
        )
    return out


def _check(r: Reading, now: float, limits: Limits) -> None:
    if not EPOCH_MIN_S <= r.ts <= EPOCH_MAX_S:
        raise PayloadError(f"timestamp {r.ts:.0f} is not plausible epoch seconds")
    if r.ts > now + limits.max_future_s:
        raise PayloadError(f"timestamp {r.ts - now:.0f} s in the future")
    if not limits.low_c <= r.value_c <= limits.high_c:
        raise PayloadError(
            f"value {r.value_c:.6g} degC outside the plausible range "
            f"[{limits.low_c:g}, {limits.high_c:g}]"
        )


def excerpt(payload: bytes, limit: int) -> str:
    """The payload for the dead-letter table: text, undecodable bytes escaped, truncated."""
    text = payload[: limit * 4].decode("utf-8", errors="backslashreplace").replace("\x00", "\\x00")
    if len(text) > limit or len(payload) > limit * 4:
        return text[:limit] + f"... ({len(payload)} bytes)"
    return text
