"""The newest readings' own bend (predictors.direction): the parabola's slope and curvature
against closed forms, and the rule that a curve speeding up toward the threshold is not given a
slowing answer, on a two-node body integrated by scipy's solve_ivp."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.integrate import solve_ivp
from thermeta.predictors import forecast
from thermeta.predictors.direction import newest_tangent
from thermeta.predictors.outcome import NoteCode

T0_EPOCH = 1_700_000_000.0


def test_parabola_recovers_slope_and_curvature_and_its_crossings():
    """Readings on y = 5 + 0.01 x + 2e-5 x^2 (x from the newest reading): slope 0.01 /s and
    curvature 4e-5 /s^2 at the newest reading; the tangent reaches 10 in 500 s and the parabola
    where 2e-5 x^2 + 0.01 x - 5 = 0 (closed form)."""
    x = np.arange(-600.0, 0.1, 30.0)
    y = 5 + 0.01 * x + 2e-5 * x * x
    tan = newest_tangent(x + T0_EPOCH, y)
    assert tan is not None
    assert tan.slope == pytest.approx(0.01, rel=1e-9)
    assert tan.curvature == pytest.approx(4e-5, rel=1e-9)
    assert tan.eta(10.0) == pytest.approx(500.0, rel=1e-9)
    root = (-0.01 + math.sqrt(1e-4 + 4 * 2e-5 * 5)) / (2 * 2e-5)
    assert tan.parabola_eta(10.0) == pytest.approx(root, rel=1e-9)
    assert tan.accelerates_toward(10.0) and not tan.accelerates_toward(0.0)


def test_a_lagging_sensor_speeding_up_is_not_given_a_slowing_answer():
    """A sensor with its own mass in a load (two nodes: load k1 toward 30 degC, sensor k2 toward
    the load; truth from solve_ivp), seen for its first ten minutes while it still speeds up
    (the regime search off: its flat start is not the point here): the forecast of the 20 degC
    crossing is no later than the straight line of the present slope (which an accelerating
    curve reaches first) and says why by its code."""
    k1, k2 = 1 / 1800, 1 / 300

    def rhs(_t, s):
        load, sensor = s
        return [-k1 * (load - 30.0), -k2 * (sensor - load)]

    x = np.arange(0.0, 600.1, 10.0)
    sol = solve_ivp(rhs, (0, 6000), [5.0, 5.0], dense_output=True, rtol=1e-10, atol=1e-10)
    y = sol.sol(x)[1] + np.random.default_rng(3).normal(0, 0.01, x.size)
    fc = forecast(x + T0_EPOCH, y, 20.0, limit="upper", detect_regimes=False)
    assert NoteCode.ACCELERATING in [n.code for n in fc.notes]
    slope_now = float(sol.sol(x[-1:])[1][0] - sol.sol(x[-1:] - 1.0)[1][0])
    assert fc.eta_s is not None and fc.eta_s <= (20.0 - y[-1]) / slope_now * 1.2
    assert fc.eta_lo_s is not None and fc.eta_lo_s <= fc.eta_s


def test_a_falling_rate_tells_two_time_constants_from_one():
    """combine.slowing: a two-node body (air and walls; solve_ivp) warming toward 30 degC slows
    faster than one exponential, one exponential with the same scatter does not (the rate of
    each half's fit compared at a one-sided 99 % point)."""
    from thermeta.predictors.candidates import Spec
    from thermeta.predictors.combine import slowing

    def rhs(_t, s):
        air, wall = s
        return [-(air - wall) / 200.0 - (air - 30.0) / 2000.0, -(wall - air) / 3000.0]

    x = np.arange(0.0, 3000.1, 15.0)
    sol = solve_ivp(rhs, (0, 3100), [10.0, 10.0], dense_output=True, rtol=1e-10, atol=1e-10)
    noise = np.random.default_rng(8).normal(0, 0.02, x.size)
    two = sol.sol(x)[0] + noise
    one = 30.0 - 20.0 * np.exp(-x / 900.0) + noise
    spec = Spec(noise_sd=0.02)
    assert slowing(x + T0_EPOCH, two, spec)
    assert not slowing(x + T0_EPOCH, one, spec)


def test_a_load_holding_steady_is_a_forecast_not_a_failure():
    """A walk-in holding 4.5 degC with 0.2 degC scatter for an hour, limit 8 degC: the
    self-check's first-half fit sees the level already reached (ETA 0), which is an answer,
    not a division by zero; the forecast is made, with the ambient given and fitted."""
    rng = np.random.default_rng(14)
    t = T0_EPOCH + np.arange(0, 3600, 60.0)
    y = 4.5 + rng.normal(0, 0.2, t.size)
    for kw in ({"ambient": 4.5}, {}):
        fc = forecast(t, y, 8.0, limit="upper", **kw)
        assert fc.ok, fc.reason
