"""The simulated sites: their physics against outside references, their noise, and their truth."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.integrate import solve_ivp
from thermeta.daemon.simulation import physics as P
from thermeta.daemon.simulation import scenarios as S
from thermeta.predictors.conduction_series import theta_centre


def _ode_reference(pieces, air0, load0, kl, t_eval):
    """dTa/dt = -ka (Ta - U_i), dT/dt = -kl (T - Ta), by scipy's solve_ivp, piece by piece."""
    out = []
    y = [air0, load0]
    bounds = [p[0] for p in pieces[1:]] + [t_eval[-1] + 1.0]
    for (s, u, ka), end in zip(pieces, bounds):

        def rhs(t, z, u=u, ka=ka):
            return [-ka * (z[0] - u), -kl * (z[1] - z[0])]

        sel = t_eval[(t_eval >= s) & (t_eval < end)]
        sol = solve_ivp(rhs, (s, end), y, t_eval=sel, rtol=1e-10, atol=1e-10, method="DOP853")
        out.append(sol.y)
        y = [
            float(v)
            for v in solve_ivp(rhs, (s, end), y, rtol=1e-10, atol=1e-10, method="DOP853").y[:, -1]
        ]
    return np.concatenate(out, axis=1)


def test_two_stage_matches_solve_ivp_across_pieces():
    """The exact piecewise air/load solution agrees with scipy's ODE solver (rtol 1e-10) for a
    door-ajar drive of three pieces."""
    pieces = [(0.0, 3.0, 1 / 900), (1800.0, 16.0, 1 / 480), (3000.0, -6.0, 1 / 900)]
    t = np.linspace(0, 3 * 3600, 400)
    air, load = P.two_stage(t, pieces, 3.0, 3.0, 1 / 9000)
    ref = _ode_reference(pieces, 3.0, 3.0, 1 / 9000, t)
    assert np.allclose(air, ref[0], atol=1e-7)
    assert np.allclose(load, ref[1], atol=1e-7)


def test_two_stage_equal_rates_limit():
    """With the air and load rates equal, the t e^(-kt) limit is used and still matches
    solve_ivp."""
    pieces = [(0.0, 30.0, 1 / 3600)]
    t = np.linspace(0, 5 * 3600, 50)
    _, load = P.two_stage(t, pieces, 2.0, 2.0, 1 / 3600)
    ref = _ode_reference(pieces, 2.0, 2.0, 1 / 3600, t)
    assert np.allclose(load, ref[1], atol=1e-7)


def test_reefer_load_matches_solve_ivp_after_the_failure():
    """The reefer's top pallet (held at 2 degC, then following the warming air once the power
    fails) agrees with scipy's solve_ivp over the whole run."""
    sc = S.build("reefer-power-loss")
    p = sc.probe("eastpier/reefer-12/load-top")
    fail = sc.events[0][0] - sc.t_start
    pieces = [(0.0, 2.0, 1 / 3600), (fail, 29.0, 1 / (1.2 * 3600))]
    x = np.linspace(0, 6 * 3600, 100)
    ref = _ode_reference(pieces, 2.0, 2.0, 1 / (4.5 * 3600), x)
    assert np.allclose(p.spec.curve(x), ref[1], atol=1e-7)


def test_centre_probe_step_is_the_series_solution():
    """A single step of the air gives exactly Ta + (Ti - Ta) theta_centre(Fo, Bi)."""
    a, bi = 5e-5, 1.5
    x = np.linspace(0, 10 * 3600, 200)
    got = P.centre_probe(x, lambda g: np.full(g.shape, 4.0), -22.0, bi, a, "slab")
    want = 4.0 + (-22.0 - 4.0) * theta_centre(a * x, bi, "slab")
    assert np.allclose(got, want, atol=1e-9)


def test_centre_probe_matches_method_of_lines_heat_equation():
    """The Duhamel centre temperature for a ramping air agrees within 0.01 degC with the heat
    equation in a slab (symmetric centre, convective surface) solved by the method of lines with
    scipy's solve_ivp (BDF): dtheta/dFo = d2theta/dx2, -dtheta/dx = Bi (theta - Ta) at x = 1."""
    a, bi, Ti = 4.9e-5, 1.5, -22.0
    pieces = [(0.0, -22.0, 1 / 3600), (1800.0, 4.0, 1 / 5400)]

    def air(g):
        return P.two_stage(np.asarray(g, float), pieces, -22.0)[0]

    n = 60
    dx = 1.0 / (n - 1)

    def rhs(t, T):
        d = np.empty_like(T)
        d[1:-1] = (T[2:] - 2 * T[1:-1] + T[:-2]) / dx**2
        d[0] = 2 * (T[1] - T[0]) / dx**2
        ghost = T[-2] - 2 * dx * bi * (T[-1] - float(air(np.array([t]))[0]))
        d[-1] = (ghost - 2 * T[-1] + T[-2]) / dx**2
        return a * d

    t_eval = np.linspace(0, 8 * 3600, 49)
    sol = solve_ivp(
        rhs, (0, t_eval[-1]), np.full(n, Ti), t_eval=t_eval, method="BDF", rtol=1e-8, atol=1e-8
    )
    got = P.centre_probe(t_eval, air, Ti, bi, a, "slab", step_s=10.0)
    assert np.max(np.abs(got - sol.y[0])) < 0.01


def test_wort_crossing_is_newtons_law_and_under_an_hour():
    """The wort's true crossing of 20 degC is the closed form of Newton's law,
    t = ln((T0 - Tc)/(thr - Tc)) / k after chilling starts, with k = eff * flow / volume; and it
    lands well under an hour from the boil (common practice)."""
    sc = S.build("wort-chill")
    p = sc.probe("copperbeck/brewhouse/batch-0417/wort")
    k = 0.8 * 150 / 2000 / 60
    want = 300 + math.log((97 - 9) / (20 - 9)) / k
    assert p.crossing_t_true - sc.t_start == pytest.approx(want, abs=2.0)
    assert want < 3600


def test_cooling_schedule_verdicts():
    """Tray A meets both stages of the cooling schedule (57 -> 21 degC within 2 h, -> 5 degC within
    6 h in total: FDA Food Code 2022, 3-501.14, from memory); the deep tray C misses stage 1."""
    sc = S.build("blast-chill-rice")
    a = sc.probe("riverside-canteen/blast-1/tray-a").truth
    c = sc.probe("riverside-canteen/blast-1/tray-c").truth
    assert a["stage1_met"] == 1.0 and a["stage2_met"] == 1.0
    assert a["t21"] - a["t57"] < 2 * 3600
    assert c["stage1_met"] == 0.0
    assert c["t21"] - c["t57"] > 2 * 3600


def test_healthy_cold_room_air_cycles_and_crates_never_cross():
    """The thermostat keeps the cold room's air between its switch points (1.5 and 4 degC) and the
    crates never reach the 5 degC limit (cold holding: FDA Food Code 2022, 3-501.16, from
    memory)."""
    sc = S.build("cold-room-healthy")
    air = sc.probe("hillside-dairy/cold-room-b/air").y_clean
    assert air.min() > 1.5 - 1e-6 and air.max() < 4.0 + 1e-6
    assert air.max() - air.min() > 2.0  # it really cycles
    for p in sc.loads:
        assert p.crossing_t_true is None
        assert p.y_clean.max() < 4.0


@pytest.mark.parametrize("name", list(S.SITES))
def test_truth_crossing_lies_on_the_clean_curve(name):
    """Where a load's truth says it crosses, its noise-free curve is at the threshold there and on
    the near side just before."""
    sc = S.build(name)
    for p in sc.loads:
        c = p.crossing_t_true
        if c is None:
            continue
        x = c - sc.t_start
        thr = p.spec.threshold
        assert float(p.spec.curve(np.array([x]))[0]) == pytest.approx(thr, abs=0.02)
        before = float(p.spec.curve(np.array([max(x - 120.0, 0.0)]))[0])
        assert (before < thr) if p.spec.direction == "rising" else (before > thr)


def test_readings_look_like_a_real_probe():
    """Readings come in 0.1 degC steps, with noise of the stated size, a few spikes and dropouts,
    in time order; noise-free values agree with the probe's curve."""
    sc = S.build("all", seed=3)
    spikes = 0
    gaps = 0
    for p in sc.probes:
        assert np.allclose(p.y * 10, np.round(p.y * 10), atol=1e-6)
        assert np.all(np.diff(p.t) >= 0)
        assert np.allclose(p.y_clean, p.spec.curve(p.t - sc.t_start))
        resid = (p.y - p.y_clean)[~p.spike_mask]
        assert np.std(resid) < 0.2
        spikes += int(p.spike_mask.sum())
        gaps += int(np.sum(np.diff(p.t) > 3 * p.spec.dt_s))
    assert spikes >= 5 and gaps >= 5
    load = sc.probe("eastpier/reefer-12/load-top")
    resid = (load.y - load.y_clean)[~load.spike_mask]
    # 0.06 sd noise plus 0.1 steps (uniform rounding, sd 0.1/sqrt(12) = 0.029)
    assert 0.04 < np.std(resid) < 0.09


def test_seeded_and_validated():
    """The same seed gives the same readings, another seed others; bad names and durations raise
    ValueError."""
    a, b, c = (
        S.build("walkin-door-ajar", seed=1),
        S.build("walkin-door-ajar", seed=1),
        S.build("walkin-door-ajar", seed=2),
    )
    assert np.array_equal(a.probes[1].y, b.probes[1].y)
    assert not np.array_equal(a.probes[1].y, c.probes[1].y)
    with pytest.raises(ValueError, match="unknown scenario"):
        S.build("greenhouse")
    with pytest.raises(ValueError):
        S.build("wort-chill", duration_s=-1)
