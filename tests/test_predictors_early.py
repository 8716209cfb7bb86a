"""Early and cycling forecasts against solve_ivp trajectories: few readings, no bend, a
thermostat."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.integrate import solve_ivp
from thermeta.predictors import forecast

T0_EPOCH = 1_764_600_000.0


def newton(t_rel: np.ndarray, T0: float, k: float, ambient: float) -> np.ndarray:
    """dT/dt = -k (T - Ta) integrated by scipy.integrate.solve_ivp (rtol 1e-10)."""
    sol = solve_ivp(
        lambda s, T: -k * (T - ambient),
        (0.0, float(t_rel[-1])),
        [T0],
        t_eval=t_rel,
        rtol=1e-10,
        atol=1e-12,
        method="DOP853",
    )
    return sol.y[0]


def thermostat(
    duration_s: float,
    dt_s: float,
    low: float,
    high: float,
    warm: float,
    coil: float,
    k: float,
    drift_per_s: float = 0.0,
) -> tuple[np.ndarray, np.ndarray]:
    """A cold room's air under an on/off thermostat: dT/dt = -k (T - coil) with the compressor on
    until T <= low, -k (T - warm) off until T >= high, integrated piecewise by solve_ivp with its
    terminal events at the set points; sampled every dt_s.  drift_per_s moves both set points
    (a unit losing ground)."""
    t_out = np.arange(0.0, duration_s, dt_s)
    ts, ys = [], []
    t, T, on = 0.0, 0.5 * (low + high), False
    while t < duration_s:
        ta = coil if on else warm

        def hit(s, y, on=on):
            edge = (low if on else high) + drift_per_s * s
            return y[0] - edge

        hit.terminal = True
        sol = solve_ivp(
            lambda s, y, ta=ta: -k * (y - ta),
            (t, duration_s),
            [T],
            events=hit,
            dense_output=True,
            rtol=1e-9,
            atol=1e-11,
            max_step=60.0,
        )
        end = sol.t_events[0][0] if sol.t_events[0].size else duration_s
        sel = (t_out >= t) & (t_out < end)
        ts.append(t_out[sel])
        ys.append(sol.sol(t_out[sel])[0])
        t, T, on = end, float(sol.sol(end)[0]), not on
    return np.concatenate(ts), np.concatenate(ys)


def test_four_readings_with_a_given_ambient_give_an_honest_forecast():
    """Four readings of a warming load (every 5 min, 0.1 degC steps) and an ambient given 2 degC
    off: a forecast comes out (the default min_points no longer waits for eight), and its 90 %
    interval holds the solve_ivp crossing time; one reading is refused (reference:
    scipy.integrate.solve_ivp)."""
    k, T0, amb, thr = 1 / 18000, 2.0, 27.0, 8.0
    x = np.arange(0, 4) * 300.0
    y = np.round(newton(x, T0, k, amb) / 0.1) * 0.1
    fc = forecast(x + T0_EPOCH, y, thr, ambient=amb + 2.0, limit="upper")
    assert fc.ok and fc.n_points == 4 and fc.eta_s is not None
    true_eta = math.log((T0 - amb) / (thr - amb)) / k - x[-1]
    assert fc.eta_lo_s <= true_eta and (fc.eta_hi_s is None or true_eta <= fc.eta_hi_s)
    too_few = forecast(x[:1] + T0_EPOCH, y[:1], thr, ambient=amb, limit="upper")
    assert not too_few.ok and "too few readings" in too_few.reason


def test_no_bend_with_the_ambient_fitted_extrapolates_the_present_slope():
    """A warming load seen for 20 min of a 5 h time constant (no bend above its 0.1 degC noise),
    the ambient left to the fit: the ETA follows the fitted curve's present slope, comes before
    the solve_ivp crossing (the true curve bends away), lies inside the interval, and the forecast
    says why (reference: scipy.integrate.solve_ivp)."""
    k, T0, amb, thr = 1 / 18000, 2.0, 27.0, 8.0
    rng = np.random.default_rng(3)
    x = np.arange(0, 1200.1, 60.0)
    y = newton(x, T0, k, amb) + rng.normal(0, 0.1, x.size)
    fc = forecast(x + T0_EPOCH, y, thr, limit="upper")
    assert fc.ok and fc.eta_s is not None
    assert any("no significant bend" in w for w in fc.warnings)
    true_eta = math.log((T0 - amb) / (thr - amb)) / k - x[-1]
    assert fc.eta_s < true_eta
    assert abs(fc.eta_s - true_eta) / true_eta < 0.25
    assert fc.eta_lo_s <= fc.eta_s and (fc.eta_hi_s is None or fc.eta_s <= fc.eta_hi_s)


@pytest.mark.parametrize("period_hint_k", [1 / 2400, 1 / 1200])
def test_healthy_thermostat_sawtooth_forecasts_no_crossing(period_hint_k):
    """A healthy cold room cycling between 2 and 5 degC (solve_ivp with the set points as events)
    seen through sliding 2 h windows: never an ETA for 8 degC, with the ambient fitted or given
    (reference: scipy.integrate.solve_ivp; a thermostat's on/off band, common practice)."""
    t, y = thermostat(8 * 3600.0, 30.0, 2.0, 5.0, 18.0, -8.0, period_hint_k)
    rng = np.random.default_rng(11)
    y = np.round((y + rng.normal(0, 0.1, y.size)) / 0.1) * 0.1
    etas = []
    for end in np.arange(7200.0, t[-1], 1200.0):
        sel = (t > end - 7200.0) & (t <= end)
        for kw in ({}, {"ambient": 18.0}):
            fc = forecast(t[sel] + T0_EPOCH, y[sel], 8.0, limit="upper", **kw)
            assert fc.ok, fc.reason
            etas.append(fc.eta_s)
    assert all(e is None for e in etas)
    assert (
        fc.model == "lumped" and fc.pattern == "cycling" and any("cycle" in w for w in fc.warnings)
    )


def test_thermostat_losing_ground_gets_a_crossing():
    """The same room whose set points drift up by 0.75 degC per hour (a unit losing ground): the
    cycle means' drift forecasts the swing's top reaching 8 degC, inside its interval, within
    30 % of the time the drifting top takes (reference: scipy.integrate.solve_ivp)."""
    drift = 0.75 / 3600
    t, y = thermostat(2 * 3600.0, 30.0, 2.0, 5.0, 25.0, -8.0, 1 / 1500, drift_per_s=drift)
    fc = forecast(t + T0_EPOCH, y, 8.0, limit="upper")
    assert fc.ok and fc.model == "lumped" and fc.pattern == "cycling" and fc.eta_s is not None
    top_now = 5.0 + drift * t[-1]
    expected = (8.0 - top_now) / drift
    assert abs(fc.eta_s - expected) / expected < 0.3
    assert fc.eta_lo_s <= fc.eta_s <= fc.eta_hi_s


def test_power_loss_with_the_air_heading_unclear_is_forecast_from_the_middle():
    """A reefer after a power loss (air toward 27 degC with a 1 h time constant, the load toward
    the air with 5 h), seen for the first quarter of the time to 8 degC, every 3 min: where the
    air's own fit does not pin its asymptote down, the ETA is still within 25 % of the solve_ivp
    crossing and inside its interval, which holds the truth (reference: scipy.integrate.solve_ivp
    of dA/dt = -ka (A - Tout), dT/dt = -k (T - A))."""
    ka, k, out, T0, thr = 1 / 3600, 1 / 18000, 27.0, 2.0, 8.0

    def crossed(s, u):
        return u[1] - thr

    crossed.terminal = True
    sol = solve_ivp(
        lambda s, u: [-ka * (u[0] - out), -k * (u[1] - u[0])],
        (0.0, 1e6),
        [T0, T0],
        events=crossed,
        rtol=1e-10,
        atol=1e-12,
        dense_output=True,
    )
    t_cross = float(sol.t_events[0][0])
    x = np.arange(0, 0.25 * t_cross, 180.0)
    air_true, load_true = sol.sol(x)
    unclear = 0
    for seed in range(8):
        rng = np.random.default_rng(seed)
        air = np.round((air_true + rng.normal(0, 0.1, x.size)) / 0.1) * 0.1
        load = np.round((load_true + rng.normal(0, 0.1, x.size)) / 0.1) * 0.1
        fc = forecast(x + T0_EPOCH, load, thr, ambient_t=x + T0_EPOCH, ambient_y=air, limit="upper")
        if not any("not clear yet" in w for w in fc.warnings):
            continue
        unclear += 1
        true_eta = t_cross - x[-1]
        assert fc.ok and fc.eta_s is not None
        assert abs(fc.eta_s - true_eta) / true_eta < 0.25
        assert fc.eta_lo_s <= fc.eta_s <= fc.eta_hi_s
        assert fc.eta_lo_s <= true_eta <= fc.eta_hi_s
    assert unclear >= 1


def test_three_readings_give_a_straight_trend_with_an_open_late_end():
    """Three readings of a warming load (every 5 min, 0.1 degC steps), the ambient left to the
    fit: fewer than a curve needs, so the forecast is the straight trend, its early end before
    the solve_ivp crossing and its late end open; with min_points given, the caller's floor holds
    (reference: scipy.integrate.solve_ivp)."""
    k, T0, amb, thr = 1 / 18000, 2.0, 27.0, 8.0
    x = np.arange(0, 3) * 300.0
    y = np.round(newton(x, T0, k, amb) / 0.1) * 0.1
    fc = forecast(x + T0_EPOCH, y, thr, limit="upper")
    true_eta = math.log((T0 - amb) / (thr - amb)) / k - x[-1]
    assert fc.ok and fc.eta_s is not None and fc.eta_hi_s is None
    assert fc.eta_lo_s <= min(fc.eta_s, true_eta)
    assert any("straight trend" in w for w in fc.warnings)
    strict = forecast(x + T0_EPOCH, y, thr, limit="upper", min_points=8)
    assert not strict.ok and "too few readings" in strict.reason
