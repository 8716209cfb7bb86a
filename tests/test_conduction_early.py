"""Early centre-probe forecasts, while the centre has barely moved: the data cannot yet tell the
Biot number or the time scale apart, and the 90 % interval must open to every curve they cannot
exclude instead of staying in the best fit's own basin.

Reference: scipy's solve_ivp on the method of lines of the heat equation
(synth_conduction.centre_mol: finite volumes, convective surface), not the series the fit uses.
"""

from __future__ import annotations

import math

import numpy as np
from thermeta.daemon.simulation.synth_conduction import centre_mol
from thermeta.predictors.conduction import fit_conduction

FO = np.linspace(0.0, 3.0, 601)


def _centre(bi: float) -> np.ndarray:
    """theta at the centre of a slab (1 -> 0) on FO, by the method of lines."""
    return centre_mol("slab", bi, FO, lambda f: np.zeros_like(np.asarray(f, float)), 1.0, 40)


def early_slab_hits(seed: int = 1919) -> tuple[int, int]:
    """(covered, cases) over 8 Biot numbers 0.5-5 (one method-of-lines run each), 3 cases each."""
    rng = np.random.default_rng(seed)
    hits = n = 0
    for bi in np.geomspace(0.5, 5.0, 8):
        theta = _centre(float(bi))
        for _ in range(3):
            a = 1.1e-6 / float(rng.uniform(0.05, 0.2)) ** 2
            amb, ti, thr = float(rng.uniform(2.0, 8.0)), -22.0, -15.0
            cen = amb + (ti - amb) * theta
            j = int(np.nonzero(cen >= thr)[0][0])
            fo_x = FO[j - 1] + (thr - cen[j - 1]) / (cen[j] - cen[j - 1]) * (FO[j] - FO[j - 1])
            seen = float(rng.uniform(0.1, 0.3)) * fo_x / a
            t = np.arange(0.0, max(seen, 10 * 60.0), 60.0)
            y = np.round((np.interp(a * t, FO, cen) + rng.normal(0.0, 0.1, t.size)) / 0.1) * 0.1
            _, lo, hi = fit_conduction(t + 1.8e9, y, "slab", ambient=amb).time_to_threshold(thr)
            eta_true = fo_x / a - t[-1]
            n += 1
            hits += lo is not None and lo <= eta_true <= (math.inf if hi is None else hi)
    return hits, n


def test_early_slab_interval_covers_the_method_of_lines_truth():
    """A frozen slab (-22 degC) warming in air at 2-8 degC toward a -15 degC limit, Bi 0.5-5,
    half-thickness 5-20 cm (alpha 1.1e-6 m2/s), seen only 10-30 % of the way (in time) to its
    crossing, readings every minute (noise 0.1, quantised to 0.1 degC), ambient given: the 90 %
    interval covers the true crossing in at least 80 % of 24 seeded cases.  Measured when
    written, seeds 1919 / 7 / 8: 22, 23, 22 of 24; before the interval scanned the whole
    (Bi, a) range, 18, 18, 16 (the best fit at the lowest Biot number from a still-flat centre,
    "crossing in days", and the refits from it never reached the thick-body curves)."""
    hits, n = early_slab_hits()
    assert hits / n >= 0.8, (hits, n)


def test_demo_large_carton_early_interval_holds_its_truth():
    """The demo's trailer (its air steady at -22 degC, then rising toward +4 degC after the unit
    fails): half an hour after the failure its large carton's centre has not moved, the fit
    lands at the lowest Biot number and never crosses, yet curves that fit as well cross within
    hours: the interval, called as the refitter calls forecast(), must reach the simulator's
    true crossing (it started at 10 days, the truth 3.6 h away)."""
    from thermeta.daemon.simulation.scenarios import build
    from thermeta.predictors import forecast

    sc = build("all", seed=0)
    load = sc.probe("route9/trailer-4/carton-large")
    air = sc.probe("route9/trailer-4/air")
    now = sc.t_start + 60 * 60.0  # the failure at +30 min, seen for 30 min
    sel, asel = load.t <= now, air.t <= now
    fc = forecast(
        load.t[sel],
        load.y[sel],
        -15.0,
        model="slab",
        ambient_t=air.t[asel],
        ambient_y=air.y[asel],
        window_s=12 * 3600.0,
        limit="upper",
    )
    assert fc.ok
    assert load.crossing_t_true is not None
    eta_true = load.crossing_t_true - float(load.t[sel][-1])
    lo = 0.0 if fc.eta_lo_s is None else fc.eta_lo_s
    hi = math.inf if fc.eta_hi_s is None else fc.eta_hi_s
    assert lo <= eta_true <= hi, (fc.eta_s, lo, hi, eta_true)
    assert lo < 24 * 3600.0  # a crossing within the day is not excluded
