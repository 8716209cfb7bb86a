"""The one format of times and durations people read (daemon/timefmt.py), and the alert's words
around it: the headline, the site's zone, the stale alert whose forecast time has passed, the
configured "what to do" line.  Zone offsets from the IANA time zone database (CET is UTC+1 in
December, IST UTC+5:30)."""

from __future__ import annotations

from datetime import UTC, datetime

import pytest
from thermeta.daemon import timefmt
from thermeta.daemon.alerts.message import headline, sentence, todo_for
from thermeta.daemon.timefmt import clock, clock_span, duration, parse_since, span, use_zone

T = datetime(2026, 12, 4, 13, 5, tzinfo=UTC).timestamp()  # 14:05 in Amsterdam


@pytest.fixture
def amsterdam():
    use_zone("Europe/Amsterdam")
    yield
    use_zone(None)


def test_durations_are_minutes_then_hours_and_minutes_then_days():
    """Whole minutes under an hour, hours and two-digit minutes up to 48 h, days and hours
    beyond; under half a minute is said in words, never '0s'."""
    assert [duration(s) for s in (10, 45, 2520, 3600, 11100, 47 * 3600, 200000, None)] == [
        "under 1 min",
        "1 min",
        "42 min",
        "1 h 00 min",
        "3 h 05 min",
        "47 h 00 min",
        "2 d 8 h",
        "-",
    ]


def test_an_interval_is_one_value_when_its_ends_round_together_and_says_an_open_end():
    """[75m-75m] becomes '1 h 15 min'; an open end reads 'or later'; shared minutes are said
    once; nothing is ever '0s-inf'."""
    assert span(4500, 4510) == "1 h 15 min"
    assert span(2100, 3000) == "35 to 50 min"
    assert span(3000, 11100) == "50 min to 3 h 05 min"
    assert span(240, None) == "4 min or later"
    assert span(0, None) == "under 1 min or later"
    assert span(None, None) == "-"


def test_clock_times_are_in_the_sites_zone_with_the_date_on_other_days(amsterdam):
    """The config's zone, its abbreviation shown; the date only when the day differs from the
    reference time's."""
    assert clock(T, T) == "14:05 CET"
    assert clock(T + 86400, T) == "2026-12-05 14:05 CET"
    assert clock_span(T, T + 41 * 60, T) == "14:05 to 14:46 CET"
    assert clock_span(T, None, T) == "from 14:05 CET, no later bound"
    use_zone("Asia/Kolkata")
    assert clock(T, T) == "18:35 IST"


def test_a_bare_date_is_the_start_of_that_day_in_the_sites_zone(amsterdam):
    """--since 2026-12-03 is midnight in Amsterdam (23:00 UTC the day before); RFC 3339 still
    works; a bad date says what it wants."""
    assert parse_since("2026-12-03") == datetime(2026, 12, 2, 23, 0, tzinfo=UTC).timestamp()
    assert parse_since("2026-12-03T00:00:00Z") == datetime(2026, 12, 3, tzinfo=UTC).timestamp()
    with pytest.raises(ValueError, match="YYYY-MM-DD"):
        parse_since("2026-13-03")


def test_an_unknown_zone_is_named():
    with pytest.raises(ValueError, match="Mars/Olympus"):
        use_zone("Mars/Olympus")
    assert timefmt.zone() is not None


def _alert(**kw):
    a = {
        "item": "reefer-07",
        "event": "approaching",
        "unit": "C",
        "threshold": 8.0,
        "value_now": 6.4,
        "kind": "limit",
        "side": "above",
        "at_s": T,
        "eta_s": 2520.0,
        "eta_lo_s": 1620.0,
        "eta_hi_s": None,
        "crossing_at_s": T + 2520.0,
        "crossing_lo_at_s": T + 1620.0,
        "crossing_hi_at_s": None,
        "site": "north-yard",
    }
    a.update(kw)
    return a


def test_the_headline_says_item_site_event_and_time_left(amsterdam):
    """The issue's own example: 'reefer-07: crosses 8 °C in about 42 min', with the site."""
    assert headline(_alert()) == "reefer-07 (north-yard): may cross 8.0 °C in about 42 min"
    assert headline(_alert(event="crossed")) == "reefer-07 (north-yard): above 8.0 °C, 6.4 °C now"
    late = _alert(event="late", kind="target", deadline_at_s=T + 3600, site=None)
    assert headline(late) == "reefer-07: may miss 8.0 °C by 15:05 CET"


def test_an_open_late_end_is_said_in_words(amsterdam):
    s = sentence(_alert())
    assert "at 14:47 CET, in 42 min (90 %: not before 14:32 CET, in 27 min; no later bound)" in s


def test_a_stale_item_whose_crossing_time_passed_says_the_readings_stopped(amsterdam):
    """Not 'due now (90 %: 0 s to 0 s)': the readings stopped while it was about to cross."""
    a = _alert(
        event="stale",
        eta_s=0.0,
        crossing_at_s=T,
        last_reading_at_s=T - 1200,
        silence_s=900,
    )
    s = sentence(a)
    assert "has sent no reading for 20 min" in s
    assert "the readings stopped while it was about to cross its limit of 8.0 °C" in s
    assert headline(a) == "reefer-07 (north-yard): no readings for 20 min"
    far = sentence(dict(a, crossing_at_s=T + 7200))
    assert "about to cross" not in far


def test_what_to_do_is_one_line_for_warnings_or_one_per_event():
    """A plain line goes with every warning, not with good news; a table picks by event."""
    line = "check the unit's power; move the load if it is not back within 20 min"
    assert todo_for(line, "approaching") == line
    assert todo_for(line, "reached") is None
    table = {"crossed": "move the load", "stale": "check the probe's battery"}
    assert todo_for(table, "stale") == "check the probe's battery"
    assert todo_for(table, "approaching") is None


def test_log_lines_are_stamped_in_the_sites_zone(amsterdam):
    """The text log's time carries the site's zone and its name, like the alerts in it."""
    import io
    import logging

    from thermeta.daemon.logsetup import configure

    buf = io.StringIO()
    root = logging.getLogger()
    saved = (list(root.handlers), root.level)
    try:
        configure("info", stream=buf)
        record = logging.LogRecord("thermeta.t", logging.WARNING, __file__, 1, "hello", None, None)
        record.created = T
        root.handlers[0].handle(record)
    finally:
        root.handlers[:] = saved[0]
        root.setLevel(saved[1])
    assert buf.getvalue().startswith("2026-12-04 14:05:00 CET WARNING thermeta.t: hello")


def test_a_cycle_note_says_its_centre_only_where_the_readings_are():
    """A thermostat's note names the centre of the cycling only when the newest readings lie
    in its swing: a wort chilled in steps (four falling teeth, means 41 to 31 degC) and then
    held flat at 18 degC shows no full cycle, and the note says so instead of "the readings
    cycle around 31.1 +- 11" while they read 18.0 (invented readings)."""
    from types import SimpleNamespace

    import numpy as np
    from thermeta.predictors.cycling import cycling_forecast
    from thermeta.predictors.result import Forecast

    t1 = np.arange(0, 80 * 60, 60.0)
    y1 = 41.0 - (t1 / 4800) * 10.0 + ((t1 % 1200) / 1200 - 0.5) * 2.0
    t2 = np.arange(80 * 60, 110 * 60, 60.0)
    t, y = np.concatenate([t1, t2]), np.concatenate([y1, np.full(t2.size, 18.0)])
    ctx = SimpleNamespace(t=t, y=y, threshold=20.0, noise_sd=0.05, limit="lower")
    fc = cycling_forecast(ctx, Forecast(20.0, "lumped", "fitted", int(t.size)))
    (note,) = [n.text for n in fc.notes]
    assert "around" not in note and "fewer than the 3" in note, note
    assert fc.eta_s is None
    # a steady sawtooth around 3 degC still says where it cycles
    ts = np.arange(0, 6 * 3600, 60.0)
    ys = 3.0 + ((ts % 1800) / 1800 - 0.5) * 2.0
    ctx = SimpleNamespace(t=ts, y=ys, threshold=5.0, noise_sd=0.05, limit="upper")
    (note,) = [n.text for n in cycling_forecast(ctx, Forecast(5.0, "lumped", "fitted", 360)).notes]
    assert "around 2.99 +- 0.97 over 11 full cycles" in note, note
