"""Forecasts from two or three readings (a logger's gaps): the two-reading solve toward a given
ambient, a straight trend with the ambient fitted, a measured air through few readings, and an
air gap bridged by the air's own curve."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.integrate import solve_ivp
from thermeta.predictors import forecast
from thermeta.predictors.few import PROBE_SCATTER_SD, assumed_scatter, few_quantum

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


def newton_crossing(T0: float, k: float, ambient: float, thr: float) -> float:
    """The time the solve_ivp trajectory reaches thr (a terminal event)."""

    def hit(s, T):
        return T[0] - thr

    hit.terminal = True
    sol = solve_ivp(
        lambda s, T: -k * (T - ambient), (0.0, 1e7), [T0], events=hit, rtol=1e-10, atol=1e-12
    )
    return float(sol.t_events[0][0])


def test_two_readings_with_a_given_ambient_match_the_two_reading_solve():
    """Two exact readings of a warming load and its ambient: k and the ETA are the textbook
    two-reading solve, k = ln((Ta - T1) / (Ta - T2)) / (t2 - t1) and
    eta = ln((Ta - T2) / (Ta - thr)) / k (from memory), and the solve_ivp crossing too."""
    k, T0, amb, thr = 1 / 18000, 2.0, 27.0, 8.0
    x = np.array([0.0, 420.0])
    y = newton(x, T0, k, amb)
    fc = forecast(x + T0_EPOCH, y, thr, ambient=amb, limit="upper")
    assert fc.ok and fc.n_points == 2 and fc.model == "lumped" and fc.ambient_mode == "known"
    k_solve = math.log((amb - y[0]) / (amb - y[1])) / (x[1] - x[0])
    eta_solve = math.log((amb - y[1]) / (amb - thr)) / k_solve
    assert fc.k_per_s == pytest.approx(k_solve, rel=1e-9)
    assert fc.eta_s == pytest.approx(eta_solve, rel=1e-9)
    assert fc.eta_s == pytest.approx(newton_crossing(T0, k, amb, thr) - x[-1], rel=1e-6)
    assert 0 < fc.eta_lo_s < fc.eta_s
    assert fc.eta_hi_s is None or fc.eta_hi_s > fc.eta_s
    assert any("only 2 readings" in w for w in fc.warnings)


def test_two_reading_interval_covers_the_solve_ivp_crossing():
    """200 seeded warming loads seen through two readings 2-15 min apart, 0.1 degC steps, noise
    0.05-0.15 (inside the assumed scatter), the ambient given up to 3 degC off: the 90 % interval
    holds the solve_ivp crossing time in 85-99 % of cases (wide on purpose: two readings cannot
    measure their scatter), and its early end is a real bound, above 0, in every case (the alert
    rules read it); reference: scipy.integrate.solve_ivp."""
    rng = np.random.default_rng(2026)
    hits, n = 0, 200
    for _ in range(n):
        T0, amb = rng.uniform(0.5, 4.5), rng.uniform(21.0, 33.0)
        k = 1.0 / rng.uniform(2.5 * 3600, 9 * 3600)
        x = np.array([0.0, rng.uniform(120.0, 900.0)])
        y = newton(x, T0, k, amb) + rng.normal(0.0, rng.uniform(0.05, 0.15), 2)
        y = np.round(y / 0.1) * 0.1
        thr = 8.0
        fc = forecast(x + T0_EPOCH, y, thr, ambient=amb + rng.uniform(-3.0, 3.0), limit="upper")
        assert fc.ok and fc.eta_lo_s is not None and fc.eta_lo_s > 0
        true_eta = newton_crossing(T0, k, amb, thr) - x[-1]
        hi = math.inf if fc.eta_hi_s is None else fc.eta_hi_s
        hits += fc.eta_lo_s <= true_eta <= hi
    assert 0.85 <= hits / n <= 0.99


def test_two_readings_with_the_ambient_fitted_give_a_straight_trend():
    """Two exact readings, the ambient left to the fit: the straight trend through them,
    eta = (thr - T2) / slope, earlier than the solve_ivp crossing (the curve bends away); the
    early end is above 0 and before it, and the late end is open (reference: solve_ivp)."""
    k, T0, amb, thr = 1 / 18000, 2.0, 27.0, 8.0
    x = np.array([0.0, 600.0])
    y = newton(x, T0, k, amb)
    fc = forecast(x + T0_EPOCH, y, thr, limit="upper")
    slope = (y[1] - y[0]) / (x[1] - x[0])
    assert fc.ok and fc.ambient_mode == "fitted"
    assert fc.eta_s == pytest.approx((thr - y[1]) / slope, rel=1e-9)
    assert fc.eta_s < newton_crossing(T0, k, amb, thr) - x[-1]
    assert fc.eta_hi_s is None and 0 < fc.eta_lo_s < fc.eta_s
    assert any("straight trend" in w for w in fc.warnings)


@pytest.mark.parametrize("kw", [{}, {"ambient": 27.0}])
def test_one_reading_is_too_few(kw):
    """One reading fits nothing: "too few readings to fit", with the ambient fitted or given;
    and with min_points given, two readings are refused as before."""
    fc = forecast([T0_EPOCH], [2.0], 8.0, limit="upper", **kw)
    assert not fc.ok and "too few readings to fit" in fc.reason
    fc = forecast([T0_EPOCH, T0_EPOCH + 300], [2.0, 2.1], 8.0, limit="upper", min_points=4, **kw)
    assert not fc.ok and "too few readings to fit" in fc.reason


def test_two_readings_moving_away_give_no_crossing():
    """Two readings cooling away from an upper threshold toward a given colder ambient: no
    crossing, and the forecast says why."""
    fc = forecast([T0_EPOCH, T0_EPOCH + 600], [5.0, 4.6], 8.0, ambient=-2.0, limit="upper")
    assert fc.ok and fc.eta_s is None
    assert any("move away" in w or "levels off" in w for w in fc.warnings)


def test_assumed_scatter_is_the_floor_and_the_quantisation():
    """The scatter taken for readings that cannot measure it: the stated probe floor and the
    reading step's uniform sd q / sqrt(12), combined in quadrature."""
    assert few_quantum(np.array([2.3, 4.1])) == 0.1
    assert few_quantum(np.array([2.0, 4.0])) == 1.0
    assert few_quantum(np.array([2.33, 4.17])) == 0.01
    assert assumed_scatter(np.array([2.3, 4.1])) == pytest.approx(
        math.sqrt(PROBE_SCATTER_SD**2 + 0.01 / 12)
    )
    assert assumed_scatter(np.array([2.3, 4.1]), noise_sd=0.4) == pytest.approx(
        math.sqrt(0.16 + 0.01 / 12)
    )


def reefer(x: np.ndarray, ka: float, k: float, out: float, T0: float, A0: float):
    """The air toward the outside and the load toward the air, dA/dt = -ka (A - Tout),
    dT/dt = -k (T - A), by solve_ivp; returns the air, the load and a crossing finder."""
    sol = solve_ivp(
        lambda s, u: [-ka * (u[0] - out), -k * (u[1] - u[0])],
        (0.0, 1e6),
        [A0, T0],
        rtol=1e-10,
        atol=1e-12,
        dense_output=True,
    )
    air, load = sol.sol(x)
    return air, load, sol


def reefer_crossing(sol, thr: float) -> float:
    grid = np.linspace(0.0, 2e5, 200_001)
    load = sol.sol(grid)[1]
    return float(grid[np.argmax(load >= thr)])


@pytest.mark.parametrize("n_readings", [3, 4])
def test_measured_air_with_few_readings_covers_the_crossing(n_readings):
    """A reefer after a power loss seen through three or four readings of the load and of its air
    (a logger's gap took the rest): a forecast comes out for every seeded case, its early end
    above 0, and the 90 % interval holds the solve_ivp crossing in at least 80 % of 40 cases
    (reference: scipy.integrate.solve_ivp of the two coupled Newton equations)."""
    rng = np.random.default_rng(7)
    hits, n = 0, 40
    for _ in range(n):
        ka, k = 1 / rng.uniform(1800, 7200), 1 / rng.uniform(2.5 * 3600, 9 * 3600)
        out, T0 = rng.uniform(21, 33), rng.uniform(0.5, 4.5)
        x = np.sort(rng.uniform(0, 1500, n_readings))
        x -= x[0]
        air, load, sol = reefer(x, ka, k, out, T0, T0)
        q = lambda v: np.round((v + rng.normal(0, 0.1, v.size)) / 0.1) * 0.1  # noqa: E731
        fc = forecast(
            x + T0_EPOCH, q(load), 8.0, ambient_t=x + T0_EPOCH, ambient_y=q(air), limit="upper"
        )
        assert fc.ok and fc.eta_lo_s is not None and fc.eta_lo_s > 0, fc.warnings
        true_eta = reefer_crossing(sol, 8.0) - x[-1]
        hi = math.inf if fc.eta_hi_s is None else fc.eta_hi_s
        hits += fc.eta_lo_s <= true_eta <= hi
    assert hits / n >= 0.8


def test_measured_air_with_two_readings_is_a_straight_air_with_an_open_late_end():
    """Two readings of the load and its air: the air's straight trend is extrapolated, so the
    crossing comes before the solve_ivp one (the true air levels off), the early end is above 0
    and the late end open."""
    ka, k, out, T0 = 1 / 3600, 1 / 18000, 27.0, 2.0
    x = np.array([0.0, 600.0])
    air, load, sol = reefer(x, ka, k, out, T0, T0)
    fc = forecast(x + T0_EPOCH, load, 8.0, ambient_t=x + T0_EPOCH, ambient_y=air, limit="upper")
    assert fc.ok and fc.ambient_mode == "measured" and fc.eta_s is not None
    assert fc.eta_s < reefer_crossing(sol, 8.0) - x[-1]
    assert fc.eta_hi_s is None and 0 < fc.eta_lo_s <= fc.eta_s
    assert any("straight trend" in w for w in fc.warnings)


def test_a_gap_in_the_air_follows_the_air_curve():
    """A reefer's load and air every 3 min with a 30 min gap in both early on, exact readings:
    across the gap the load is driven by the air's fitted curve, not a straight line between
    the gap's ends, so k comes out within 2 % of the truth and the ETA within 1 % of the
    solve_ivp crossing (reference: scipy.integrate.solve_ivp)."""
    ka, k, out, T0 = 1 / 2400, 1 / 14400, 28.0, 2.0
    x = np.arange(0.0, 5400.0, 180.0)
    x = x[(x < 900.0) | (x > 2700.0)]
    air, load, sol = reefer(x, ka, k, out, T0, T0)
    fc = forecast(x + T0_EPOCH, load, 8.0, ambient_t=x + T0_EPOCH, ambient_y=air, limit="upper")
    assert fc.ok and fc.eta_s is not None
    assert fc.k_per_s == pytest.approx(k, rel=0.02)
    assert fc.eta_s == pytest.approx(reefer_crossing(sol, 8.0) - x[-1], rel=0.01)


def test_four_readings_against_a_steady_air_probe():
    """A blast chiller's air probe holding its set point (-3.2 degC, flat to its 0.1 degC step)
    and four readings of a tray cooling toward it, 100 s apart: the air's rate cannot be told from
    a flat line, which is no reason to fail (it once overflowed): the air is held at its mean, and
    the forecast has an interval whose early end is above 0 and that holds the solve_ivp
    crossing."""
    k, T0, air_c = 1 / 2400, 70.0, -3.2
    x = np.array([0.0, 105.1, 203.1, 295.2])
    load = np.round(newton(x, T0, k, air_c) / 0.1) * 0.1
    air = np.array([-3.2, -3.2, -3.1, -3.3])  # these four overflowed the air's rate band
    fc = forecast(x + T0_EPOCH, load, 21.0, ambient_t=x + T0_EPOCH, ambient_y=air, limit="lower")
    assert fc.ok, fc.reason
    true_eta = newton_crossing(T0, k, air_c, 21.0) - x[-1]
    hi = math.inf if fc.eta_hi_s is None else fc.eta_hi_s
    assert 0 < fc.eta_lo_s <= true_eta <= hi
    assert fc.eta_s == pytest.approx(true_eta, rel=0.1)


def test_four_readings_of_a_core_probe_get_a_core_curve_with_an_honest_interval():
    """Four readings of a slab's centre (Bi 1-3, a 3-5 cm half-thickness) and a steady air probe
    are enough for the core-probe curve (Ti, Bi and a: one degree of freedom left), with the
    scatter taken as at least the assumed one: over 30 seeded cases every forecast comes out,
    the 90 % interval holds the true crossing (the series solution of
    predictors.synth_conduction) in at least 80 % of them, and no interval is narrower than
    1 % of its ETA (a near-exact fit of four points must not look certain)."""
    from thermeta.daemon.simulation.synth import Corruption
    from thermeta.daemon.simulation.synth_conduction import core_probe

    hits, n = 0, 30
    rng = np.random.default_rng(11)
    for seed in range(n):
        L, bi = rng.uniform(0.03, 0.05), rng.uniform(1.0, 3.0)
        a = 1.4e-7 / L**2
        probe = core_probe(
            seed,
            geometry="slab",
            biot=bi,
            a_per_s=a,
            t_i=70.0,
            ambient=-3.0,
            threshold=21.0,
            seen_fraction=1.0,
            dt_s=60.0,
        )
        cross = probe.crossing_t_true - probe.t.min()
        s = core_probe(
            seed,
            geometry="slab",
            biot=bi,
            a_per_s=a,
            t_i=70.0,
            ambient=-3.0,
            threshold=21.0,
            seen_fraction=0.3,
            dt_s=0.3 * cross / 3.5,
            corruption=Corruption(noise=0.1, quantum=0.1),
        )
        t, y = np.sort(s.t)[:4], s.y[np.argsort(s.t)][:4]
        fc = forecast(
            t, y, 21.0, ambient_t=t, ambient_y=np.full(4, -3.0), model="slab", limit="lower"
        )
        assert fc.ok and fc.model == "slab" and fc.eta_s is not None, fc.reason
        true_eta = s.crossing_t_true - t.max()
        hi = math.inf if fc.eta_hi_s is None else fc.eta_hi_s
        assert hi - fc.eta_lo_s >= 0.01 * fc.eta_s
        hits += fc.eta_lo_s <= true_eta <= hi
    assert hits / n >= 0.8
