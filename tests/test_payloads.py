"""Payload parsing: JSON objects, bare numbers, SenML packs (RFC 8428), and the dead-letter
reasons."""

from __future__ import annotations

import json

import pytest
from thermeta.daemon.ingest.payloads import (
    Limits,
    PayloadError,
    excerpt,
    parse_payload,
    quick_reading,
)

NOW = 1_800_000_000.0  # 2027-01-15T08:00:00Z


def test_json_object_with_epoch_and_rfc3339_times():
    """ts may be epoch seconds or RFC 3339; value converts from the given unit to degC."""
    (r,) = parse_payload(b'{"ts": 1799999990, "value": 4.25}', NOW)
    assert (r.ts, r.value_c, r.receipt_ts) == (1799999990.0, 4.25, False)
    (r,) = parse_payload(b'{"ts": "2027-01-15T07:59:00Z", "value": 41, "unit": "F"}', NOW)
    assert r.ts == NOW - 60
    assert r.value_c == pytest.approx(
        5.0
    )  # 41 F = 5 C (FDA Food Code cold holding pair, from memory)
    (r,) = parse_payload(b'{"value": 278.15, "unit": "K"}', NOW)
    assert r.value_c == pytest.approx(5.0) and r.receipt_ts and r.ts == NOW


def test_bare_number_is_stamped_on_receipt_and_flagged():
    """A bare number takes the receipt time and says so; it is read in the item's unit."""
    (r,) = parse_payload(b" 71.6\n", NOW, unit="F")
    assert r.ts == NOW and r.receipt_ts
    assert r.value_c == pytest.approx(22.0)


def test_senml_pack_base_fields_and_relative_time():
    """SenML (RFC 8428): bn/bt carry to later records; times below 2**28 are relative to now
    (sec. 4.5.3); Cel and K are temperatures; other units are skipped."""
    pack = [
        {"bn": "urn:dev:mac:0024befffe804ff1/", "bt": NOW - 20, "bu": "Cel", "n": "temp", "v": 3.5},
        {"n": "temp", "t": 10, "v": 3.75},
        {"n": "humidity", "u": "%RH", "v": 80},
        {"n": "temp", "u": "K", "t": 20, "v": 277.15},
    ]
    got = parse_payload(json.dumps(pack).encode(), NOW)
    assert [(r.ts - NOW, round(r.value_c, 9)) for r in got] == [(-20, 3.5), (-10, 3.75), (0, 4.0)]
    rel = parse_payload(b'[{"n": "t", "u": "Cel", "t": -30, "v": 2}]', NOW)
    assert rel[0].ts == NOW - 30 and not rel[0].receipt_ts
    with pytest.raises(PayloadError, match="named 'other'"):
        parse_payload(json.dumps(pack).encode(), NOW, senml_name="other")
    only = parse_payload(json.dumps(pack).encode(), NOW, senml_name="temp")
    assert len(only) == 3


@pytest.mark.parametrize(
    "payload, reason",
    [
        (b"", "empty payload"),
        (b"\xff\xfe", "not UTF-8 text"),
        (b"warm", "not a number, JSON object or SenML pack"),
        (b"NaN", "value is not a finite number"),
        (b"inf", "value is not a finite number"),
        (b'{"value": NaN}', "value is not a finite number (NaN)"),
        (b'{"value": Infinity}', "value is not a finite number (Infinity)"),
        (b'{"value": "4.2"}', "value must be a number, got str"),
        (b'{"ts": 1}', "JSON object has no 'value'"),
        (b'{"value": 1, "unit": "R"}', "unit must be C, F or K, got 'R'"),
        (b'{"value": 999}', "value 999 degC outside the plausible range [-100, 200]"),
        (b'{"ts": 1800003600, "value": 1}', "timestamp 3600 s in the future"),
        (
            b'{"ts": 1800000000000, "value": 1}',
            "timestamp 1800000000000 is not plausible epoch seconds",
        ),
        (
            b'{"ts": "yesterday", "value": 1}',
            "ts: unparseable time 'yesterday' (want epoch seconds or RFC 3339)",
        ),
        (b'{"value": 1', "invalid JSON: Expecting ',' delimiter"),
        (b'[{"u": "%RH", "v": 50}]', "SenML pack has no temperature record (unit Cel or K)"),
        (b"[3]", "SenML record 0 is not an object"),
        (b"x" * 20000, "oversized payload (20000 bytes > 16384)"),
    ],
)
def test_invalid_payloads_give_a_reason(payload, reason):
    """Each kind of bad payload raises PayloadError with a reason fit for the dead-letter table."""
    with pytest.raises(PayloadError) as info:
        parse_payload(payload, NOW)
    assert str(info.value) == reason


def test_plausible_range_is_per_item():
    """The plausible range comes from the item's limits (degC)."""
    with pytest.raises(PayloadError):
        parse_payload(b"-30", NOW, limits=Limits(low_c=-25.0, high_c=10.0))
    assert parse_payload(b"-20", NOW, limits=Limits(low_c=-25.0, high_c=10.0))[0].value_c == -20.0


def test_excerpt_truncates_and_escapes():
    """Dead-letter excerpts are text: bytes escaped, long payloads cut with their size noted."""
    assert excerpt(b"ab\xffc", 100) == "ab\\xffc"
    long = excerpt(b"y" * 5000, 10)
    assert long == "yyyyyyyyyy... (5000 bytes)"


QUICK_CASES = [
    b'{"ts": 1799999990, "value": 4.25}',
    b'{"ts": 1799999990.5, "value": -3, "unit": "C"}',
    b'{"value": 41, "ts": 1799999990, "unit": "F"}',
    b'{"ts": 1799999990, "value": 278.15, "unit": "K"}',
    b'{"ts": 1799999990, "value": 4.25, "unit": "X"}',  # refused: unit
    b'{"ts": 1799999990, "value": 900}',  # refused: outside the plausible range
    b'{"ts": 1799999990000, "value": 4}',  # refused: milliseconds
    b'{"ts": 1800009990, "value": 4}',  # refused: in the future
    b'{"ts": "2027-01-15T07:59:00Z", "value": 4}',  # an RFC 3339 time: the full parser's job
    b'{"value": 4}',  # no time: stamped on receipt by the full parser
    b'{"ts": 1799999990, "value": true}',  # refused: a boolean
    b'{"ts": 1799999990, "value": NaN}',  # refused: not finite
    b'{"ts": 1799999990, "value": 4',  # refused: cut short
    b"\xff{}",
    b'[{"n": "t", "u": "Cel", "v": 4}]',  # SenML: the full parser's job
    b"4.5",
]


@pytest.mark.parametrize("payload", QUICK_CASES)
def test_quick_reading_agrees_with_the_full_parser(payload):
    """The ingest's hot path (a tuple for the common JSON object, else None) gives exactly what
    parse_payload gives when it answers, and leaves everything else (refusals included, so
    their reason comes from parse_payload) to the full parser."""
    lim = Limits(low_c=-50.0, high_c=80.0)
    quick = quick_reading(payload, NOW, "C", lim)
    try:
        full = parse_payload(payload, NOW, "C", lim)
    except PayloadError:
        full = None
    if quick is not None:
        assert full is not None and len(full) == 1 and not full[0].receipt_ts
        assert quick == (full[0].ts, full[0].value_c)
    simple = payload.startswith(b'{"ts": 17') and b'unit": "X' not in payload
    if simple and full is not None:
        assert quick is not None  # the common case does take the hot path
