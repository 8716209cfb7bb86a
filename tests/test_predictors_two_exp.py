"""Two time constants toward one ambient (predictors.two_exp) against scipy's ODE solver.

The reference is the two-node body itself: C1 dT1/dt = G12 (T2 - T1), C2 dT2/dt = G12 (T1 - T2)
+ H (Ta - T2), integrated by scipy.integrate.solve_ivp (rtol 1e-10), with the crossing found by
the solver's event; the two rates are the eigenvalues of the system's matrix (numpy.linalg).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.integrate import solve_ivp
from thermeta.predictors.two_exp import crossing, eta_interval, fit_two_exp

C1, C2, G12, H = 1.0, 0.5, 1.0 / 300.0, 1.0 / 2400.0  # content, vessel, coupling, to the room
TA, T1_0, T2_0 = 21.0, 85.0, 21.0  # a hot liquid poured into a vessel at room temperature


def rhs(t, x):
    return [G12 * (x[1] - x[0]) / C1, (G12 * (x[0] - x[1]) + H * (TA - x[1])) / C2]


def reference(t: np.ndarray, threshold: float):
    """The content's temperature at t and the first time it reaches threshold (solve_ivp)."""
    event = lambda s, x: x[0] - threshold  # noqa: E731
    event.terminal = True
    sol = solve_ivp(
        rhs,
        (0.0, 40 * 3600.0),
        [T1_0, T2_0],
        rtol=1e-10,
        atol=1e-10,
        dense_output=True,
        events=event,
    )
    return sol.sol(t)[0], float(sol.t_events[0][0])


def rates() -> np.ndarray:
    """The decay rates of the two-node system: minus the eigenvalues of its matrix."""
    A = np.array([[-G12 / C1, G12 / C1], [G12 / C2, -(G12 + H) / C2]])
    return np.sort(-np.linalg.eigvals(A).real)[::-1]


def test_noise_free_two_node_body_is_recovered():
    """From solve_ivp readings of the content over its first hour (every 20 s), the fit finds
    the room (21 degC), both rates (the system's eigenvalues) and the time the content reaches
    40 degC (the solver's event) to a fraction of a per cent."""
    t = np.arange(0.0, 3600.0, 20.0)
    y, cross = reference(t, 30.0)
    fit = fit_two_exp(t, y)
    assert fit.ok
    assert fit.ambient == pytest.approx(TA, abs=0.05)
    k_fast, k_slow = rates()
    assert fit.k1 == pytest.approx(k_fast, rel=1e-3)
    assert fit.k2 == pytest.approx(k_slow, rel=1e-3)
    assert crossing(fit, 30.0, "lower") == pytest.approx(cross - t[-1], rel=1e-3)


def test_given_ambient_and_one_exponential():
    """With the room given exactly the fit keeps it; on one exponential (one rate, no second
    mode) the crossing is that exponential's closed form, ln((T0 - Ta) / (thr - Ta)) / k."""
    t = np.arange(0.0, 3600.0, 20.0)
    y, cross = reference(t, 30.0)
    fit = fit_two_exp(t, y, ambient=TA, ambient_sd=0.0)
    assert fit.ok and fit.ambient == TA
    assert crossing(fit, 30.0, "lower") == pytest.approx(cross - t[-1], rel=1e-3)
    k = 1 / 1800.0
    y1 = 5.0 + 20.0 * np.exp(-k * t)
    one = fit_two_exp(t, y1)
    eta = crossing(one, 6.0, "lower")
    assert eta == pytest.approx(np.log(20.0 / 1.0) / k - t[-1], rel=1e-3)


def test_interval_covers_the_solver_crossing():
    """Seeded readings of the content with 0.05 degC scatter, seen for 40 min: the 90 %
    profile interval of the time to 30 degC holds the solver's crossing in 80-98 % of 60 cases
    (a calibrated 90 % interval, standard estimation theory), and is never open at both ends."""
    t = np.arange(0.0, 2400.0, 30.0)
    clean, cross = reference(t, 30.0)
    hits = []
    for seed in range(60):
        y = clean + np.random.default_rng(seed).normal(0.0, 0.05, t.size)
        fit = fit_two_exp(t, y, noise_sd=0.05)
        lo, hi = eta_interval(fit, 30.0)
        assert lo is not None
        true = cross - t[-1]
        hits.append(lo <= true <= (np.inf if hi is None else hi))
    assert 0.80 <= np.mean(hits) <= 0.98
