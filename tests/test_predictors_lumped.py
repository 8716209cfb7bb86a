"""The lumped (Newton) forecast against outside references: solve_ivp, lmfit, the trade's
figures."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.integrate import solve_ivp
from thermeta.daemon.simulation import synth
from thermeta.daemon.simulation.synth import Corruption
from thermeta.predictors import forecast
from thermeta.predictors.lumped import fit_lumped


def newton_reference(t_rel: np.ndarray, T0: float, k: float, ambient) -> np.ndarray:
    """dT/dt = -k (T - Ta(t)) integrated by scipy.integrate.solve_ivp (rtol 1e-10)."""
    amb = ambient if callable(ambient) else (lambda s: ambient)
    sol = solve_ivp(
        lambda s, T: -k * (T - amb(s)),
        (0.0, float(t_rel[-1])),
        [T0],
        t_eval=t_rel,
        rtol=1e-10,
        atol=1e-12,
        method="DOP853",
    )
    return sol.y[0]


def test_synth_lumped_matches_solve_ivp():
    """Reference: scipy.integrate.solve_ivp (rtol 1e-10) of dT/dt = -k (T - Ta) agrees with the
    closed form our generator and model use, to 1e-7 degC."""
    x = np.linspace(0, 7200, 241)
    ref = newton_reference(x, 2.0, 1 / 18000, 27.0)
    assert np.allclose(synth.lumped_curve(x, 2.0, 27.0, 1 / 18000), ref, atol=1e-7)


def test_fit_recovers_solve_ivp_trajectory():
    """Fitting noise-free readings taken from the solve_ivp trajectory returns its k and Ta
    (reference: scipy.integrate.solve_ivp) and the analytic crossing time."""
    x = np.arange(0, 1500, 20.0)
    y = newton_reference(x, 95.0, 1 / 900, 12.0)
    fc = forecast(x + synth.T_START, y, 20.0)
    assert fc.ok and fc.model == "lumped" and fc.ambient_mode == "fitted"
    assert fc.k_per_s == pytest.approx(1 / 900, rel=1e-4)
    assert fc.ambient == pytest.approx(12.0, abs=1e-3)
    cross = math.log((95 - 12) / (20 - 12)) * 900
    assert fc.eta_s == pytest.approx(cross - x[-1], abs=1.0)
    assert fc.direction == "falling" and fc.interval_method == "profile likelihood"


def test_agrees_with_lmfit():
    """lmfit (PyPI, an independent Levenberg-Marquardt fit) on the same noisy readings agrees
    with our k and Ta within a small fraction of their standard errors."""
    lmfit = pytest.importorskip("lmfit")
    s = synth.lumped(
        3,
        T0=90,
        ambient=14,
        k_per_s=1 / 1200,
        threshold=20,
        duration_s=2400,
        dt_s=10,
        corruption=Corruption(noise=0.2),
    )
    x = s.t - s.t[0]
    model = lmfit.Model(lambda x, a, b, k: a + b * np.exp(-k * x))
    params = model.make_params(a=10, b=80, k=1e-3)
    res = model.fit(s.y, params, x=x)
    ours = fit_lumped(s.t, s.y, 20.0)
    assert ours.k_per_s == pytest.approx(res.params["k"].value, rel=1e-4)
    assert ours.ambient == pytest.approx(res.params["a"].value, abs=0.1 * res.params["a"].stderr)
    # and both contain the truth within their 90 % ranges
    assert ours.k_lo <= 1 / 1200 <= ours.k_hi
    assert ours.ambient_lo <= 14 <= ours.ambient_hi


def test_seven_eighths_is_three_half_cooling_times():
    """ASHRAE Handbook - Refrigeration (from memory): for a pure exponential the seven-eighths
    cooling time is three half-cooling times; lag factor j = 1 for the lumped model."""
    s = synth.lumped(
        1,
        T0=60,
        ambient=3,
        k_per_s=1 / 2000,
        threshold=5,
        duration_s=3000,
        dt_s=30,
        corruption=Corruption(noise=0.1),
    )
    d = forecast(s.t, s.y, 5.0).to_dict()
    assert d["seven_eighths_cooling_s"] == pytest.approx(3 * d["half_cooling_s"], rel=1e-12)
    assert d["half_cooling_s"] == pytest.approx(math.log(2) * d["time_constant_s"], rel=1e-12)
    assert d["lag_factor_j"] == 1.0


def test_never_reaching_asymptote_gives_no_eta():
    """A curve levelling off short of the threshold: eta None, and no upper bound."""
    s = synth.lumped(
        2,
        T0=60,
        ambient=26,
        k_per_s=1 / 1800,
        threshold=21,
        duration_s=3600,
        dt_s=30,
        corruption=Corruption(noise=0.1, quantum=0.1),
    )
    fc = forecast(s.t, s.y, 21.0)
    assert fc.ok and fc.eta_s is None and fc.eta_hi_s is None
    assert fc.to_dict()["crossing_at"] is None


def test_already_past_gives_zero():
    """The curve crossed the threshold within the data: eta 0; an upper limit already exceeded
    counts as past too."""
    s = synth.lumped(
        4,
        T0=2,
        ambient=27,
        k_per_s=1 / 9000,
        threshold=8,
        duration_s=5000,
        dt_s=60,
        corruption=Corruption(noise=0.05),
    )
    assert s.eta_true_s == 0.0
    assert forecast(s.t, s.y, 8.0).eta_s == 0.0
    flat = np.full(40, 9.0) + np.random.default_rng(0).normal(0, 0.05, 40)
    t = synth.T_START + 60.0 * np.arange(40)
    assert forecast(t, flat, 8.0, limit="upper").eta_s == 0.0


def test_rising_and_falling_both_forecast():
    """Warming toward a known ambient and chilling toward a fitted one both give an ETA near
    the truth, with the right direction, counted from the newest reading."""
    up = synth.lumped(
        5,
        T0=3,
        ambient=25,
        k_per_s=1 / 14400,
        threshold=8,
        duration_s=3000,
        dt_s=60,
        corruption=Corruption(noise=0.05, quantum=0.1),
    )
    fc = forecast(up.t, up.y, 8.0, ambient=25.0)
    assert fc.direction == "rising" and fc.ambient_mode == "known"
    assert fc.eta_s == pytest.approx(up.eta_true_s, rel=0.05)
    assert fc.eta_lo_s <= up.eta_true_s <= fc.eta_hi_s
    assert any("uncertain" in w for w in fc.warnings)
    down = synth.lumped(
        6,
        T0=95,
        ambient=12,
        k_per_s=1 / 600,
        threshold=20,
        duration_s=700,
        dt_s=10,
        corruption=Corruption(noise=0.2, quantum=0.1),
    )
    fd = forecast(down.t, down.y, 20.0)
    assert fd.direction == "falling"
    assert fd.eta_s == pytest.approx(down.eta_true_s, rel=0.05)
    assert fd.t_last == pytest.approx(down.t_last)


def test_free_ambient_with_little_curvature_is_wide():
    """Honest intervals: a cold load early in its warming, ambient free, gets a much wider
    interval than the same readings with the ambient known."""
    s = synth.lumped(
        7,
        T0=2,
        ambient=27,
        k_per_s=1 / 18000,
        threshold=8,
        duration_s=2400,
        dt_s=60,
        corruption=Corruption(noise=0.1, quantum=0.1),
    )
    free = forecast(s.t, s.y, 8.0)
    known = forecast(s.t, s.y, 8.0, ambient=27.0, ambient_uncertainty=0.0)
    width = lambda f: (f.eta_hi_s if f.eta_hi_s is not None else math.inf) - f.eta_lo_s
    assert width(free) > 2 * width(known)
    assert known.eta_lo_s <= s.eta_true_s <= known.eta_hi_s


def test_bad_data_is_a_result_not_a_crash():
    """Empty, all-NaN, single-instant and constant series return ok=False or a sane forecast,
    never an exception; bad arguments raise ValueError."""
    assert not forecast([], [], 8.0).ok
    assert not forecast([1, 2, 3], [np.nan] * 3, 8.0).ok
    fc = forecast(np.full(20, 5.0), np.arange(20.0), 8.0)
    assert not fc.ok and fc.reason
    const = forecast(synth.T_START + 60.0 * np.arange(30), np.full(30, 4.0), 8.0)
    assert const.eta_s is None
    with pytest.raises(ValueError):
        forecast([1, 2], [1, 2, 3], 8.0)
    with pytest.raises(ValueError):
        forecast([1, 2], [1, 2], 8.0, model="cubic")


def test_predict_draws_the_fitted_curve():
    """predict(fc, t) reproduces the fitted lumped curve (at the newest reading: value_fit_now),
    and the measured model's forecast curve from the newest reading on."""
    from thermeta.predictors import predict

    s = synth.lumped(
        9,
        T0=60,
        ambient=3,
        k_per_s=1 / 2000,
        threshold=5,
        duration_s=3000,
        dt_s=30,
        corruption=Corruption(noise=0.05),
    )
    fc = forecast(s.t, s.y, 5.0)
    assert predict(fc, np.array([fc.t_last]))[0] == pytest.approx(fc.params["value_fit_now"])
    assert predict(fc, np.array([fc.crossing_t]))[0] == pytest.approx(5.0, abs=1e-6)
    m = synth.measured_air(
        4,
        load_T0=3,
        air_T0=3,
        outside=30,
        k_air_per_s=1 / 3600,
        k_load_per_s=1 / 18000,
        threshold=8,
        duration_s=3600,
        corruption=Corruption(noise=0.1),
    )
    fm = forecast(m.t, m.y, 8.0, ambient_t=m.ambient_t, ambient_y=m.ambient_y)
    assert predict(fm, np.array([fm.crossing_t]))[0] == pytest.approx(8.0, abs=1e-2)


def test_limit_side_and_window():
    """limit="lower": a chill already below the target is past (0) while an upper limit on the
    same readings is not; window_s keeps only the newest stretch of history."""
    s = synth.lumped(
        10,
        T0=95,
        ambient=10,
        k_per_s=1 / 600,
        threshold=20,
        duration_s=1800,
        dt_s=10,
        corruption=Corruption(noise=0.2, quantum=0.1),
    )
    assert forecast(s.t, s.y, 20.0, limit="lower").eta_s == 0.0
    assert forecast(s.t, s.y, 20.0, limit="upper").eta_s is None
    fw = forecast(s.t, s.y, 20.0, window_s=600.0)
    assert fw.n_points <= 61 and fw.regime_start >= s.t_last - 600.0
    with pytest.raises(ValueError):
        forecast(s.t, s.y, 20.0, limit="sideways")
