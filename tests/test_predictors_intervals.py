"""Interval coverage over >= 200 seeded simulated cases, the measured-ambient model against
solve_ivp, and the baselines / Cramer-Rao bound."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.integrate import solve_ivp
from scipy.optimize import least_squares
from thermeta.daemon.simulation import synth
from thermeta.daemon.simulation.synth import Corruption
from thermeta.predictors import forecast
from thermeta.predictors.baselines import (
    air_load,
    crb_eta_sd,
    crb_eta_sd_air,
    crb_eta_sd_given,
    crb_eta_sd_known,
    curve_fit_eta,
    linear_eta,
    two_reading_eta,
    two_reading_k,
)
from thermeta.predictors.measured import response


def _case(seed: int):
    r = np.random.default_rng(seed)
    if seed % 2:  # chilling, ambient fitted
        T0, amb, tau, thr = r.uniform(80, 98), r.uniform(6, 16), r.uniform(600, 1500), 20.0
        kw: dict = {}
    else:  # warming, ambient known exactly
        T0, amb, tau, thr = r.uniform(1, 4), r.uniform(20, 32), r.uniform(9000, 30000), 8.0
        kw = {"ambient": amb, "ambient_uncertainty": 0.0}
    k = 1 / tau
    dur = r.uniform(0.35, 0.65) * synth.lumped_crossing_s(T0, amb, k, thr)
    s = synth.lumped(
        seed,
        T0=T0,
        ambient=amb,
        k_per_s=k,
        threshold=thr,
        duration_s=dur,
        dt_s=r.uniform(10, 60),
        corruption=Corruption(noise=r.uniform(0.05, 0.3)),
    )
    return s, kw


def test_eta_interval_coverage_200_cases():
    """The 90 % profile-likelihood interval for the crossing time covers the truth in 85-95 %
    of 240 seeded cases (standard estimation theory: a calibrated 90 % interval); the k
    interval and, where the ambient is fitted, the ambient's interval cover near 90 % too."""
    hits, k_hits, a_hits = [], [], []
    for seed in range(240):
        s, kw = _case(seed)
        fc = forecast(s.t, s.y, s.threshold, **kw)
        hi = math.inf if fc.eta_hi_s is None else fc.eta_hi_s
        hits.append(fc.eta_lo_s <= s.eta_true_s <= hi)
        k_hits.append(fc.k_lo_per_s <= s.truth["k_per_s"] <= fc.k_hi_per_s)
        if not kw:  # ambient fitted: its interval too
            a_hits.append(fc.ambient_lo <= s.truth["ambient"] <= fc.ambient_hi)
    assert 0.85 <= np.mean(hits) <= 0.95, np.mean(hits)
    assert 0.83 <= np.mean(k_hits) <= 0.97, np.mean(k_hits)
    assert 0.80 <= np.mean(a_hits) <= 0.97, np.mean(a_hits)


def test_known_ambient_off_by_two_is_covered():
    """Issue 2: a given ambient 2 degC off; the ambient uncertainty folded into the interval
    keeps coverage near 90 % over 200 cases, where treating it as exact does not."""
    cov, cov_exact = [], []
    for seed in range(200):
        r = np.random.default_rng(900 + seed)
        T0, amb, tau = r.uniform(0.5, 4.5), r.uniform(21, 33), r.uniform(2.5, 9) * 3600
        dur = r.uniform(0.35, 0.65) * synth.lumped_crossing_s(T0, amb, 1 / tau, 8.0)
        s = synth.lumped(
            seed,
            T0=T0,
            ambient=amb,
            k_per_s=1 / tau,
            threshold=8.0,
            duration_s=dur,
            dt_s=60,
            corruption=Corruption(noise=0.1, quantum=0.1),
        )
        given = amb + (2.0 if seed % 2 else -2.0)
        for out, sd in ((cov, 2.5), (cov_exact, 0.0)):
            fc = forecast(s.t, s.y, 8.0, ambient=given, ambient_uncertainty=sd)
            hi = math.inf if fc.eta_hi_s is None else fc.eta_hi_s
            out.append(fc.eta_lo_s <= s.eta_true_s <= hi)
    assert np.mean(cov) >= 0.85
    assert np.mean(cov_exact) < np.mean(cov)


def test_measured_response_matches_solve_ivp():
    """The exact piecewise-linear-air recursion of the measured model reproduces
    scipy.integrate.solve_ivp (rtol 1e-10) of dT/dt = -k (T - Ta(t)) with Ta(t) an exponential
    approach to the outside air, sampled irregularly."""
    rng = np.random.default_rng(3)
    s = np.sort(np.concatenate([[0.0], rng.uniform(0, 20000, 400)]))
    air = lambda x: 30 - 27 * np.exp(-x / 3600)
    k, T0 = 1 / 15000, 3.0
    P, G = response(np.array([k]), s, air(s))
    ours = T0 * P[0] + G[0]
    ref = solve_ivp(
        lambda x, T: -k * (T - air(x)),
        (0, s[-1]),
        [T0],
        t_eval=s,
        rtol=1e-10,
        atol=1e-12,
        method="DOP853",
    ).y[0]
    # linear interpolation of the air between readings is the only approximation
    assert np.max(np.abs(ours - ref)) < 2e-3


def test_measured_air_forecast():
    """The reefer case (air toward outside, load toward air): the closed form of the generator
    matches solve_ivp, and the forecast recovers k and the crossing time, inside its interval."""
    kw = {
        "load_T0": 3.0,
        "air_T0": 3.0,
        "outside": 30.0,
        "k_air_per_s": 1 / 3600,
        "k_load_per_s": 1 / 18000,
    }
    x = np.linspace(0, 20000, 101)
    air, load = synth.air_load_curves(x, **kw)
    ref = solve_ivp(
        lambda s, y: [-kw["k_air_per_s"] * (y[0] - 30.0), -kw["k_load_per_s"] * (y[1] - y[0])],
        (0, x[-1]),
        [3.0, 3.0],
        t_eval=x,
        rtol=1e-10,
        atol=1e-12,
    ).y
    assert np.allclose(air, ref[0], atol=1e-6) and np.allclose(load, ref[1], atol=1e-6)
    s = synth.measured_air(
        4, **kw, threshold=8.0, duration_s=3600, corruption=Corruption(noise=0.1)
    )
    fc = forecast(s.t, s.y, 8.0, ambient_t=s.ambient_t, ambient_y=s.ambient_y)
    assert fc.ok and fc.ambient_mode == "measured" and fc.direction == "rising"
    assert fc.eta_s == pytest.approx(s.eta_true_s, rel=0.08)
    assert fc.eta_lo_s <= s.eta_true_s <= fc.eta_hi_s
    assert fc.k_lo_per_s <= 1 / 18000 <= fc.k_hi_per_s


def test_crb_matches_fisher_of_a_numerical_jacobian():
    """Standard estimation theory: J = (1/sigma^2) sum grad f grad f', Var(eta) >= g' J^-1 g;
    our closed-form gradients agree with finite differences, and the bound falls as 1/sqrt(n)."""
    t = np.arange(0, 1200, 10.0)
    T_now, k, amb, thr, sig = 50.0, 1 / 900, 12.0, 20.0, 0.2
    x = t - t[-1]

    def f(p):
        return p[2] + (p[0] - p[2]) * np.exp(-p[1] * x)

    def eta(p):
        return math.log((p[0] - p[2]) / (thr - p[2])) / p[1]

    p = np.array([T_now, k, amb])
    h = np.array([1e-5, 1e-9, 1e-5])
    G = np.column_stack(
        [(f(p + np.eye(3)[i] * h[i]) - f(p - np.eye(3)[i] * h[i])) / (2 * h[i]) for i in range(3)]
    )
    g = np.array(
        [
            (eta(p + np.eye(3)[i] * h[i]) - eta(p - np.eye(3)[i] * h[i])) / (2 * h[i])
            for i in range(3)
        ]
    )
    num = math.sqrt(g @ np.linalg.solve(G.T @ G / sig**2, g))
    assert crb_eta_sd(t, T_now, k, amb, thr, sig) == pytest.approx(num, rel=1e-4)
    assert crb_eta_sd_known(t, T_now, k, amb, thr, sig) < num
    t4 = np.arange(0, 1200, 2.5)
    assert crb_eta_sd(t4, T_now, k, amb, thr, sig) == pytest.approx(num / 2, rel=0.02)


def test_baselines():
    """Two-reading k is exact on a noise-free curve with the ambient known (Newton's law);
    linear extrapolation and curve_fit give finite ETAs on a warming load."""
    x = np.arange(0, 3000, 60.0)
    y = synth.lumped_curve(x, 2.0, 27.0, 1 / 18000)
    assert two_reading_k(x[0], y[0], x[-1], y[-1], 27.0) == pytest.approx(1 / 18000, rel=1e-9)
    true = synth.lumped_crossing_s(2.0, 27.0, 1 / 18000, 8.0) - x[-1]
    assert two_reading_eta(x, y, 27.0, 8.0) == pytest.approx(true, rel=1e-9)
    assert linear_eta(x, y, 8.0) < true  # a straight line ignores the slowing down
    assert curve_fit_eta(x, y, 8.0) == pytest.approx(true, rel=1e-3)


def test_measured_ambient_coverage_200_cases():
    """The measured-ambient interval (parametric draws from the load and air fits) covers the
    true crossing in 85-95 % of 200 seeded reefer cases (air toward outside, load toward air)."""
    hits = []
    for seed in range(200):
        r = np.random.default_rng(5000 + seed)
        T0 = r.uniform(2, 5)
        kw = {
            "load_T0": T0,
            "air_T0": T0,
            "outside": r.uniform(25, 35),
            "k_air_per_s": 1 / (r.uniform(0.5, 2) * 3600),
            "k_load_per_s": 1 / (r.uniform(3, 8) * 3600),
        }
        full = synth.measured_air(seed, threshold=8.0, duration_s=1e6, dt_s=600.0, **kw)
        cross = full.crossing_t_true - full.truth["t0"]
        s = synth.measured_air(
            seed,
            threshold=8.0,
            duration_s=r.uniform(0.35, 0.65) * cross,
            dt_s=60.0,
            corruption=Corruption(noise=r.uniform(0.05, 0.2), quantum=0.1),
            **kw,
        )
        fc = forecast(s.t, s.y, 8.0, ambient_t=s.ambient_t, ambient_y=s.ambient_y)
        hi = math.inf if fc.eta_hi_s is None else fc.eta_hi_s
        hits.append(fc.eta_lo_s <= s.eta_true_s <= hi)
    assert 0.85 <= np.mean(hits) <= 0.95, np.mean(hits)


def test_air_probe_that_stopped_reporting():
    """The air probe's last 20 minutes are missing: the air's own fit bridges the gap, a
    warning says so, and the ETA stays within 8 % of the truth."""
    s = synth.measured_air(
        4,
        load_T0=3,
        air_T0=3,
        outside=30,
        k_air_per_s=1 / 3600,
        k_load_per_s=1 / 18000,
        threshold=8.0,
        duration_s=3600,
        corruption=Corruption(noise=0.1, quantum=0.1),
    )
    q = s.ambient_t <= s.ambient_t.min() + 2400
    fc = forecast(s.t, s.y, 8.0, ambient_t=s.ambient_t[q], ambient_y=s.ambient_y[q])
    assert any("older than the item's" in w for w in fc.warnings)
    assert fc.eta_s == pytest.approx(s.eta_true_s, rel=0.08)
    assert fc.eta_lo_s <= s.eta_true_s <= fc.eta_hi_s


def test_crb_with_a_given_ambient_lies_between_known_and_fitted():
    """A Gaussian prior of sd s on the ambient adds 1/s^2 to its Fisher information: s -> 0 is the
    known-ambient bound, s -> infinity the fitted one, and the bound grows with s."""
    t = np.arange(0, 3000, 60.0)
    args = (t, 4.0, 1 / 18000, 27.0, 8.0, 0.1)
    known, fitted = crb_eta_sd_known(*args), crb_eta_sd(*args)
    sds = [1e-6, 0.5, 1.73, 5.0, 1e6]
    given = [crb_eta_sd_given(*args, s) for s in sds]
    assert given[0] == pytest.approx(known, rel=1e-6)
    assert given[-1] == pytest.approx(fitted, rel=1e-6)
    assert all(a < b for a, b in zip(given, given[1:]))


AIR_TRUTH = dict(outside=27.0, air0=3.0, k_air=1 / 3600, load0=2.5, k_load=1 / 18000)


def test_air_load_curves_match_solve_ivp():
    """The closed-form air-and-load curves against scipy's solve_ivp (rtol 1e-10) integrating
    da/dt = -ka (a - O), dT/dt = -kl (T - a)."""
    p = AIR_TRUTH
    x = np.linspace(0, 8 * 3600, 60)
    sol = solve_ivp(
        lambda _t, u: [-p["k_air"] * (u[0] - p["outside"]), -p["k_load"] * (u[1] - u[0])],
        (0, x[-1]),
        [p["air0"], p["load0"]],
        t_eval=x,
        rtol=1e-10,
        atol=1e-10,
    )
    air, load = air_load(x, **p)
    assert np.max(np.abs(air - sol.y[0])) < 1e-6
    assert np.max(np.abs(load - sol.y[1])) < 1e-6


def test_air_crb_matches_the_spread_of_a_maximum_likelihood_fit():
    """Estimation theory: with Gaussian noise the maximum-likelihood fit (scipy's least_squares
    on both probes, started at the truth) is asymptotically efficient, so the sd of its crossing
    time over seeded noise draws is close to the Cramer-Rao bound (here within 20 %)."""
    p, thr, sig = AIR_TRUTH, 8.0, 0.1
    t = np.arange(0, 2 * 3600, 120.0)
    bound = crb_eta_sd_air(t, t, p, thr, sig, sig, 0.0)
    keys = tuple(p)
    scale = np.array([abs(p[k]) for k in keys])
    air_true, load_true = air_load(t, **p)

    def resid(u, ya, yl):
        a, ld = air_load(t, **dict(zip(keys, u * scale)))
        return np.concatenate([a - ya, ld - yl])

    rng = np.random.default_rng(7)
    etas = []
    for _ in range(200):
        ya = air_true + rng.normal(0, sig, t.size)
        yl = load_true + rng.normal(0, sig, t.size)
        u = least_squares(resid, np.ones(len(keys)), x_scale="jac", args=(ya, yl)).x * scale
        fit = dict(zip(keys, u))
        grid = t[-1] + np.linspace(0, 20 * 3600, 20001)
        above = np.flatnonzero(air_load(grid, **fit)[1] >= thr)
        if above.size:
            etas.append(grid[above[0]] - t[-1])
    assert len(etas) >= 190
    assert np.std(etas) == pytest.approx(bound, rel=0.20)
