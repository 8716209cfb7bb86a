"""Levels as pure logic: mean kinetic temperature, time and degree-minutes beyond a limit, the
chance of making a deadline, each state's one test, and the episode messages.

Outside references: USP <1079.2> for the mean kinetic temperature (from memory; its 26.26 degC
figure computed from the formula), scipy's quad for the integrals, scipy's log-normal for the
chance, Newton's law of cooling for the curves.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import constants, integrate, stats
from thermeta.daemon.ingest.marks import parse_mark
from thermeta.daemon.levels.judge import chance_by, judge
from thermeta.daemon.levels.spec import Level
from thermeta.daemon.levels.tally import Excursion, Tally, budget, mkt_c
from thermeta.predictors.result import rfc3339
from thermeta.storage.errors import PayloadError

T0 = 1_800_000_000.0


def test_mkt_of_equal_times_at_20_and_30_is_26_26():
    """USP <1079.2> (from memory): dH = 83.144 kJ/mol, so dH/R = 10,000 K; equal times at 20
    and 30 degC give a mean kinetic temperature of 26.26 degC (computed from the formula)."""
    assert mkt_c([20.0, 30.0]) == pytest.approx(26.26, abs=0.005)
    assert mkt_c([20.0, 30.0], weights=[3600.0, 3600.0]) == pytest.approx(26.26, abs=0.005)


def test_mkt_against_a_second_value_computed_here():
    """A month in a pharmacy store room (invented: 21 days at 22 degC, 7 at 28, 2 at 35): the
    formula written out here with R from scipy.constants (CODATA) and dH = 83.144 kJ/mol, and
    the tally's time-weighted value from hourly readings of the same month."""
    days = [(22.0, 21), (28.0, 7), (35.0, 2)]
    dh = 83_144.0  # J/mol, USP <1079.2> (from memory)
    temps_k = np.repeat([t + 273.15 for t, _ in days], [n * 24 for _, n in days])
    # MKT = (dH/R) / -ln(mean(e^(-dH/(R T))))
    expected = dh / constants.R / -np.log(np.mean(np.exp(-dh / (constants.R * temps_k)))) - 273.15
    hourly = [t for t, n in days for _ in range(n * 24)]
    assert mkt_c(hourly) == pytest.approx(expected, abs=0.005)
    assert mkt_c(hourly) > np.mean(hourly) + 0.5  # warm days weigh more than their share
    tl = Tally(max_gap_s=7200)
    tl.add(np.arange(len(hourly)) * 3600.0, hourly)
    # joined by straight lines, each change takes one hour: a small difference
    assert tl.mkt_c == pytest.approx(expected, abs=0.1)


def test_time_and_degree_minutes_beyond_match_the_integral():
    """A room swinging 5 +- 4 degC around a day: time above 8 degC and degree-minutes above it
    from the tally of minute readings, against scipy's quad on the curve."""

    def f(t):
        return 5.0 + 4.0 * math.sin(2 * math.pi * t / 86400.0)

    t = np.arange(0, 86400.0 + 1, 60.0)
    tl = Tally(excursions={"limit": Excursion(8.0, "above")})
    tl.add(t, [f(x) for x in t])
    ex = tl.excursions["limit"]
    # sin > 3/4 for a share (pi - 2 asin(3/4)) / (2 pi) of the day
    beyond = 86400.0 * (math.pi - 2 * math.asin(0.75)) / (2 * math.pi)
    area, _ = integrate.quad(lambda x: max(0.0, f(x) - 8.0), 0, 86400.0, limit=200)
    assert ex.beyond_s == pytest.approx(beyond, rel=1e-3)
    assert ex.degree_s == pytest.approx(area, rel=1e-3)
    assert tl.covered_s == pytest.approx(86400.0) and tl.gap_s == 0


def test_a_gap_is_not_joined():
    """Readings 2 h apart are not joined: nobody knows what happened between them."""
    tl = Tally(excursions={"limit": Excursion(8.0, "above")}, max_gap_s=3600)
    tl.add([0.0, 60.0, 60.0 + 7200.0, 60.0 + 7260.0], [9.0, 9.0, 9.0, 9.0])
    assert tl.excursions["limit"].beyond_s == pytest.approx(120.0)
    assert tl.gap_s == pytest.approx(7200.0)


def test_the_chance_of_a_deadline_is_the_log_normal_of_the_interval():
    """With a 90 % interval symmetric in log time around the point ETA, the chance of crossing
    within a given time is scipy's log-normal CDF with that spread (the 90 % ends are its 5th
    and 95th percentiles)."""
    eta, a = 3600.0, 0.4
    lo, hi = eta * math.exp(-a), eta * math.exp(a)
    dist = stats.lognorm(s=a / stats.norm.ppf(0.95), scale=eta)
    for left in (1800.0, 3000.0, 3600.0, 4500.0, 7200.0):
        assert chance_by(left, eta, lo, hi) == pytest.approx(dist.cdf(left), abs=1e-9)
    assert chance_by(4000.0, eta, lo, None) == pytest.approx(0.5)  # an open late end
    assert chance_by(4000.0, None, None, None) == 0.0  # never gets there
    assert chance_by(0.0, eta, lo, hi) == 0.0


def _fc(now, value, eta=None, lo=None, hi=None, ok=True):
    return {
        "value_now": value,
        "eta_s": eta,
        "eta_lo_s": lo,
        "eta_hi_s": hi,
        "fit_ok": ok,
        "last_reading_at": rfc3339(now),
    }


LIMIT = Level("limit", "limit", 8.0, 8.0, "above", lead_s=1800.0)
STAGE = Level("stage-1", "target", 21.0, 21.0, "below", lead_s=1800.0, within_s=7200.0, stage=1)


@pytest.mark.parametrize(
    "fc, state",
    [
        (_fc(T0, 8.0, 600, 300, 900), "approaching"),  # at the threshold is inside: not crossed
        (_fc(T0, 8.1, 0, 0, 0), "crossed"),
        (_fc(T0, 6.0, 5000, 1700, 9000), "approaching"),  # the EARLY end within lead
        (_fc(T0, 6.0, 5000, 2000, 9000), "steady"),
        (_fc(T0, 6.0, 100_000, 0, None), "steady"),  # beyond the 24 h horizon
        (_fc(T0, 6.0, None), "steady"),
        (_fc(T0, 6.0, None, ok=False), "learning"),
    ],
)
def test_a_limits_state_has_one_test(fc, state):
    """crossed: strictly past; approaching: the early end of the interval within lead and the
    crossing within the horizon; steady otherwise."""
    view = judge(LIMIT, fc, "above", T0, hysteresis=0.5, horizon_s=86400.0)
    assert view.state == state


@pytest.mark.parametrize(
    "fc, start, reached, now, state",
    [
        (_fc(T0, 40.0, 3000, 2500, 3500), None, None, T0, "waiting"),  # no episode: no deadline
        (_fc(T0, 40.0, 3000, 2500, 3500), T0, None, T0, "heading"),
        (_fc(T0, 40.0, 7300, 7000, 9000), T0, None, T0, "late"),  # the point past: told at once
        # only the LATE end past the deadline: told once the deadline is within lead (1800 s)
        (_fc(T0, 40.0, 6000, 5000, 7300), T0, None, T0, "heading"),
        (_fc(T0 + 5500, 30.0, 500, 400, 1800), T0, None, T0 + 5500, "late"),  # the LATE end decides
        (_fc(T0 + 5500, 30.0, 500, 400, None), T0, None, T0 + 5500, "late"),  # an open end counts
        (_fc(T0, 40.0, None), T0, None, T0, "short"),
        (_fc(T0 + 7300, 24.0, 600, 500, 700), T0, None, T0 + 7300, "missed"),
        (_fc(T0 + 7300, 20.0, 0, 0, 0), T0, T0 + 7000, T0 + 7300, "reached"),
    ],
)
def test_a_targets_state_has_one_test(fc, start, reached, now, state):
    """waiting (its deadline counts from an episode not started), heading, late (by the late
    end of the interval), short (never), missed (the deadline passed), reached."""
    view = judge(
        STAGE,
        fc,
        "below",
        now,
        hysteresis=0.5,
        episode_start_s=start,
        reached_at_s=reached,
        tracked=True,
    )
    assert view.state == state
    if state == "reached":
        assert view.chance == 1.0  # reached before its deadline: made


def test_a_budget_runs_out_at_the_present_course():
    """Inside the limit with a crossing forecast in 10 min and 50 min of a 1 h budget left, it
    runs out in 60 min (its early end at the interval's early end, less the readings' spacing);
    beyond the limit with 20 min left it runs out in 20 min: running out within a 30 min lead."""
    b = budget(
        "limit", 3600, 600, T0, past=False, eta_s=600, eta_lo_s=480, eta_hi_s=900,
        lead_s=1800, over="episode", since_s=T0 - 7200, slack_s=60,
    )  # fmt: skip
    assert b.runs_out_at_s == T0 + 600 + 3000 and b.runs_out_lo_s == T0 + 480 + 2940
    assert b.state == "ok"
    b = budget(
        "limit", 3600, 2400, T0, past=True, eta_s=0, eta_lo_s=0, eta_hi_s=0, lead_s=1800,
        over="episode", since_s=T0 - 7200,
    )  # fmt: skip
    assert b.runs_out_at_s == T0 + 1200 and b.state == "running_out"
    assert budget(
        "limit", 3600, 3600, T0, past=True, eta_s=0, eta_lo_s=0, eta_hi_s=0, lead_s=1800,
        over="episode", since_s=None,
    ).state == "used_up"  # fmt: skip


def test_episode_messages():
    """start / end, bare or as JSON with the batch, class and time; anything else is a dead
    letter with its reason."""
    m = parse_mark("tray-c", b"start", T0)
    assert (m.action, m.at, m.name, m.source) == ("start", T0, None, "message")
    assert parse_mark("tray-c", b"start B-0418", T0).name == "B-0418"
    m = parse_mark(
        "tray-c", b'{"episode": "start", "batch": "B-7", "class": "rice", "ts": 1799999000}', T0
    )
    assert (m.name, m.cls, m.at) == ("B-7", "rice", 1_799_999_000.0)
    assert parse_mark("tray-c", b" END ", T0).action == "end"
    for bad, why in (
        (b"begin", 'must say "start" or "end"'),
        (b'{"episode": "start", "batch": ""}', "1-200 characters"),
        (b'{"episode": "start", "ts": 1900000000}', "in the future"),
        (b"\xff", "not UTF-8"),
    ):
        with pytest.raises(PayloadError, match=why):
            parse_mark("tray-c", bad, T0)


def test_deadlines_within_and_by():
    """`within` counts from the episode's start (none without one); `by` "HH:MM" is the first
    such local time at or after the start (today's without an episode); `by` RFC 3339 is that
    moment."""
    from datetime import datetime

    lv = Level("t", "target", 20.0, 20.0, "below", 600.0, within_s=2700.0)
    assert lv.deadline(T0, T0 + 60) == T0 + 2700 and lv.deadline(None, T0) is None
    start = datetime(2027, 3, 1, 17, 0).astimezone().timestamp()  # 17:00 local
    by = Level("t", "target", 20.0, 20.0, "below", 600.0, by="16:30")
    due = datetime.fromtimestamp(by.deadline(start, start)).astimezone()
    assert (due.day, due.hour, due.minute) == (2, 16, 30)  # the next 16:30 after the start
    same_day = datetime.fromtimestamp(by.deadline(None, start)).astimezone()
    assert (same_day.day, same_day.hour) == (1, 16)  # no episode: today's
    exact = Level("t", "target", 20.0, 20.0, "below", 600.0, by="2027-03-01T18:00:00Z")
    assert (
        exact.deadline(start, start)
        == datetime.fromisoformat("2027-03-01T18:00:00+00:00").timestamp()
    )
