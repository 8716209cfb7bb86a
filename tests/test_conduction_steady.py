"""A measured ambient with no trend is carried forward at its mean (core-probe model), and the
profile interval of an early, poorly determined centre probe."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.optimize import least_squares
from scipy.stats import f as f_dist
from scipy.stats import linregress
from thermeta.daemon.simulation import synth
from thermeta.daemon.simulation.synth import Corruption
from thermeta.daemon.simulation.synth_conduction import core_probe
from thermeta.predictors.conduction import fit_conduction
from thermeta.predictors.conduction_ambient import steady_level
from thermeta.predictors.conduction_profile import _constrained_residual, cut_off


def _sphere(seed: int) -> synth.Synth:
    """A sphere's centre at 3 degC in 25 degC air, Bi 2, seen half-way in time to 8 degC."""
    return core_probe(
        seed,
        geometry="sphere",
        biot=2.0,
        a_per_s=4e-5,
        t_i=3.0,
        ambient=25.0,
        threshold=8.0,
        seen_fraction=0.5,
        dt_s=60.0,
        corruption=Corruption(noise=0.1, quantum=0.1),
    )


def test_steady_test_false_alarm_rate_and_power():
    """On constant air with 0.1 degC noise, quantised to 0.1, the no-trend test calls a trend in
    at most 5 % of 200 seeded series (its size is 1 %, Bonferroni-bounded); an air warming 1 degC
    over the same 40 min (a slope scipy's linregress finds at p < 1e-6) is never called steady."""
    t = synth.T_START + np.arange(0.0, 2400.0, 60.0)
    trend = 0
    for seed in range(200):
        rng = np.random.default_rng(seed)
        y = np.round((24.0 + rng.normal(0.0, 0.1, t.size)) / 0.1) * 0.1
        level = steady_level(t, y)
        if level is None:
            trend += 1
        else:
            assert level[0] == pytest.approx(float(np.mean(y)))
            assert 0.0 < level[1] < 0.05
    assert trend <= 10
    rng = np.random.default_rng(7)
    warm = 24.0 + (t - t[0]) / 2400.0 + rng.normal(0.0, 0.1, t.size)
    assert linregress(t, warm).pvalue < 1e-6
    assert steady_level(t, warm) is None


def test_steady_air_fit_equals_known_ambient_fit():
    """A steady, noisy air probe gives the fit at the air's mean as a known ambient (same Bi and
    crossing within 1 %), keeps ambient_mode 'measured', says so in its note, and uses the
    profile-likelihood interval, which covers the truth here."""
    s = _sphere(3)
    rng = np.random.default_rng(3)
    at = np.sort(s.t)
    ay = np.round((25.0 + rng.normal(0.0, 0.1, at.size)) / 0.1) * 0.1
    fit = fit_conduction(s.t, s.y, "sphere", ambient_t=at, ambient_y=ay)
    assert fit.ok, fit.reason
    assert fit.ambient_mode == "measured"
    assert "no trend" in (fit.ambient_note or "")
    assert fit.interval_kind == "profile"
    ref = fit_conduction(s.t, s.y, "sphere", ambient=float(np.mean(ay)))
    assert fit.biot == pytest.approx(ref.biot, rel=0.01)
    eta, lo, hi = fit.time_to_threshold(8.0)
    eta_ref, _, _ = ref.time_to_threshold(8.0)
    assert eta == pytest.approx(eta_ref, rel=0.01)
    assert lo <= s.eta_true_s <= (hi if hi is not None else np.inf)
    # With the steady hold switched off the Duhamel path is used (its note says how the air is
    # carried beyond its last reading).
    raw = fit_conduction(s.t, s.y, "sphere", ambient_t=at, ambient_y=ay, hold_steady=False)
    assert raw.ok and "no trend" not in (raw.ambient_note or "")


def test_profile_ends_are_roots_of_the_profile_statistic():
    """An early centre probe (22 readings, the centre has barely moved; the best fit drifts to a
    small Bi): each end of the profile interval is where the profile statistic crosses its
    cut-off (F(1, n - p) at the small-sample level of conduction_profile.cut_off, about 92 % here),
    checked by refits from 24 starting points over the (Bi, a) plane
    (scipy least_squares), so the warm-started search has not stopped in a stale basin and the
    refinement has not fallen back to the outer end of its bracket."""
    s = core_probe(
        12,
        geometry="sphere",
        biot=2.33,
        a_per_s=4.72e-5,
        t_i=3.58,
        ambient=23.9,
        threshold=8.0,
        seen_fraction=0.4265,
        dt_s=60.0,
        corruption=Corruption(noise=0.135, quantum=0.1),
    )
    fit = fit_conduction(s.t, s.y, "sphere", ambient=23.9)
    eta, lo, hi = fit.time_to_threshold(8.0)
    assert fit.ok and fit.interval_kind == "profile" and lo is not None and lo < eta
    curve, (t, y) = fit._curve, fit._data
    lo_b, hi_b = (np.array(b) for b in fit._bounds)
    q_hat = fit.params[1:]
    dof = t.size - fit.n_params
    cut = cut_off(dof)
    assert cut > f_dist.ppf(0.90, 1, dof)

    def d_stat(eta_s: float) -> float:
        tau = fit.t_last + eta_s
        best = np.inf
        for q0 in [q_hat] + [
            np.array([math.log(b), math.log(a)])
            for b in (0.01, 0.3, 1.0, 3.0, 10.0, 50.0)
            for a in (1e-5, 3e-5, 1e-4, 3e-4)
        ]:
            sol = least_squares(
                lambda q: _constrained_residual(curve, q, t, y, tau, 8.0)[0],
                np.clip(q0, lo_b, hi_b),
                bounds=(lo_b, hi_b),
                method="trf",
            )
            best = min(best, float(sol.fun @ sol.fun))
        return dof * (best / fit.rss - 1.0)

    assert d_stat(lo * 1.08) < cut < d_stat(lo * 0.92)
    if hi is not None:
        assert d_stat(hi * 0.92) < cut < d_stat(hi * 1.08)


def test_flat_probe_in_flat_air_below_an_upper_limit_is_no_crossing():
    """A frozen carton's centre and its air both flat at -22 degC, the limit -15 degC above: a
    body at its surroundings' temperature stays there (Newton's law and the heat equation both
    have it at rest), so the core-probe forecast is "no crossing", never "already past" because
    the flat curve leans a hair downward (the first five readings of a trailer once did)."""
    from thermeta.predictors.forecast import forecast

    rng = np.random.default_rng(0)
    for n in (5, 8, 12):
        t = np.arange(n) * 60.0
        y = np.round(-22.0 + 0.06 * rng.standard_normal(n), 1)
        air = np.round(-22.0 + 0.1 * rng.standard_normal(n), 1)
        fc = forecast(t, y, -15.0, model="slab", ambient_t=t, ambient_y=air, limit="upper")
        assert fc.eta_s is None and fc.eta_hi_s is None, (n, fc.eta_s, fc.eta_lo_s)
