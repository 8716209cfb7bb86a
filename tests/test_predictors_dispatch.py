"""Model dispatch: the core-probe models through forecast(), "auto" by AICc, and the fallback
when the conduction module is missing."""

from __future__ import annotations

import sys

import numpy as np
import pytest
from thermeta.predictors import forecast, predict, synth
from thermeta.predictors.synth import Corruption


def _sphere_case(seed: int = 3):
    from thermeta.predictors.synth_conduction import core_probe

    return core_probe(seed, geometry="sphere", biot=2.0, a_per_s=6e-5, t_i=3.0, ambient=25.0,
                      threshold=8.0, seen_fraction=0.8, dt_s=60.0,
                      corruption=Corruption(noise=0.05, quantum=0.1))


def test_sphere_model_reports_biot_and_lag():
    """--model sphere goes to the conduction fit: a Biot number and a lag factor j > 1 come back
    (Incropera & DeWitt, Table 5.1, from memory: C1 > 1 for a sphere at any Bi > 0), and the
    known-ambient crossing lands near the truth."""
    s = _sphere_case()
    fc = forecast(s.t, s.y, 8.0, model="sphere", ambient=25.0)
    assert fc.ok and fc.model == "sphere" and fc.biot is not None
    assert fc.lag_factor_j > 1.0
    assert fc.eta_s == pytest.approx(s.eta_true_s, rel=0.25)
    assert fc.to_dict()["biot"] == pytest.approx(fc.biot)
    # predict() draws the core model's own curve: it passes the threshold at the crossing
    assert predict(fc, np.array([fc.crossing_t]))[0] == pytest.approx(8.0, abs=0.05)
    assert "model_fit" not in fc.to_dict()


def test_auto_prefers_lumped_on_a_newton_curve_and_conduction_on_a_lagging_probe():
    """model="auto" keeps the lumped model for a plain exponential and picks a core model for a
    centre probe whose early readings lag (lower AICc)."""
    s = synth.lumped(2, T0=3, ambient=25, k_per_s=1 / 9000, threshold=8, duration_s=1800,
                     dt_s=60, corruption=Corruption(noise=0.05, quantum=0.1))
    fa = forecast(s.t, s.y, 8.0, model="auto", ambient=25.0)
    assert fa.model == "lumped"
    sp = _sphere_case()
    fb = forecast(sp.t, sp.y, 8.0, model="auto", ambient=25.0)
    assert fb.model in ("slab", "cylinder", "sphere")
    assert any("AICc" in w for w in fb.warnings)


def test_missing_conduction_module_is_a_result(monkeypatch):
    """Without the conduction module, a core model gives ok=False and a plain reason."""
    monkeypatch.setitem(sys.modules, "thermeta.predictors.conduction", None)
    t = synth.T_START + 60.0 * np.arange(30)
    fc = forecast(t, 3 + 0.01 * np.arange(30), 8.0, model="slab")
    assert not fc.ok and fc.reason == "conduction model not available"
