"""Temperatures in the forecast's warnings, shown in the caller's unit (predictors.wording).

Conversions checked against the definitions: degF = degC * 9/5 + 32 and K = degC + 273.15 for a
temperature, a difference scaled by 9/5 in degF and unchanged in K (NIST SP 811, Appendix B,
from memory).  Without a display unit the text is the predictors' own, byte for byte.
"""

from __future__ import annotations

import math
import re

import numpy as np
import pytest
from thermeta.daemon.simulation import synth
from thermeta.daemon.simulation.synth import Corruption
from thermeta.daemon.simulation.synth_conduction import core_probe
from thermeta.predictors import forecast
from thermeta.predictors.conduction import fit_conduction
from thermeta.predictors.prior import Prior
from thermeta.predictors.wording import DisplayUnit, point, showing, step

F = DisplayUnit(scale=9 / 5, offset=32.0, symbol="°F")  # NIST SP 811 App. B (from memory)
K = DisplayUnit(scale=1.0, offset=273.15, symbol="K")  # K = degC + 273.15 (from memory)
NUM = r"([+-]?\d+(?:\.\d+)?)"


def numbers(text: str, pattern: str) -> tuple[float, ...]:
    """The numbers a warning prints where ``pattern`` (with NUM groups) matches."""
    m = re.search(pattern, text)
    assert m is not None, (pattern, text)
    return tuple(float(g) for g in m.groups())


def only(warnings: list[str], start: str) -> str:
    found = [w for w in warnings if start in w]
    assert len(found) == 1, warnings
    return found[0]


@pytest.mark.parametrize("x", [4.444444444444445, -18.2, 0.0123, 25.0, 0.0, -0.004, 1e-9])
@pytest.mark.parametrize("spec", ["g", ".3g", ".4g", ".2g", "+.2g"])
def test_without_a_display_unit_the_text_is_format_of_the_value(x, spec):
    """No display unit (outside any block, or showing(None)): point and step print exactly what
    format(x, spec), the f-strings' own formatting, prints."""
    assert point(x, spec) == format(x, spec) and step(x, spec) == format(x, spec)
    with showing(None):
        assert point(x, spec) == format(x, spec) and step(x, spec) == format(x, spec)


def test_points_and_steps_follow_the_definitions():
    """Points: 0 degC is 32 degF and 273.15 K, 100 degC is 212 degF, -40 is -40 on both degree
    scales; steps: a 2.5 degC sd is 4.5 degF and 2.5 K, a drift of -1 degC/h is -1.8 degF/h."""
    with showing(F):
        assert [point(0.0), point(100.0), point(-40.0)] == ["32 °F", "212 °F", "-40 °F"]
        assert step(2.5) == "4.5 °F" and step(-1.0, "+.2g") == "-1.8 °F"
        assert step(0.5, "+.2g") == "+0.9 °F"
    with showing(K):
        assert point(0.0) == "273.15 K" and point(100.0) == "373.15 K"
        assert step(2.5) == "2.5 K" and step(0.15, ".2g") == "0.15 K"


def test_a_point_keeps_the_resolution_of_the_computed_text():
    """A general format counts significant digits, which on a scale with an arbitrary zero are a
    resolution: 4.44 degC at .3g is to 0.01 degree, so in K it prints 277.59, not 278; a given
    ambient echoed with g comes back as the caller wrote it (40 degF, 277.6 K); rounding a
    small negative value gives no "-0"."""
    with showing(K):
        assert point(4.44, ".3g") == "277.59 K"
        assert point(25.31, ".3g") == "298.5 K"
        assert point(277.6 - 273.15) == "277.6 K"
    with showing(F):
        assert point((40.0 - 32.0) * 5 / 9) == "40 °F"
        assert point(-17.78, ".3g") == "0 °F"  # -17.78 degC = -0.004 degF, shown to 0.1
        assert point(-18.2, ".3g") == "-0.8 °F"  # -18.2 * 9/5 + 32 = -0.76


def test_the_display_unit_is_set_for_the_block_only():
    """showing() restores the previous unit on leaving, also when the block raises."""
    with showing(F):
        with pytest.raises(RuntimeError):
            with showing(K):
                assert point(0.0) == "273.15 K"
                raise RuntimeError("inside")
        assert point(0.0) == "32 °F"
    assert point(0.0) == "0"


def test_bad_display_units_are_refused():
    """A scale that is not a finite number > 0, or something other than a DisplayUnit as
    forecast()'s shown, is a ValueError naming it."""
    for scale, offset in ((0.0, 0.0), (-1.8, 32.0), (math.nan, 0.0), (1.0, math.inf)):
        with pytest.raises(ValueError, match="display unit"):
            DisplayUnit(scale, offset, "x")
    t = synth.T_START + np.arange(0.0, 3600.0, 60.0)
    with pytest.raises(ValueError, match="shown must be a DisplayUnit"):
        forecast(t, 25.0 - 20.0 * np.exp(-(t - t[0]) / 3600.0), 10.0, shown="F")


def _known_load(seed: int = 4):
    """A load warming from 2 toward a given 25 degC (Newton's law, closed form), 0.05 noise."""
    rng = np.random.default_rng(seed)
    t = synth.T_START + np.arange(0.0, 2 * 3600.0, 60.0)
    y = 25.0 + (2.0 - 25.0) * np.exp(-(t - t[0]) / 18000.0) + rng.normal(0.0, 0.05, t.size)
    return t, y


def test_the_display_unit_changes_no_number():
    """The same forecast with and without a display unit: every field but the warnings' words
    equal, and as many warnings with the same codes."""
    t, y = _known_load()
    plain = forecast(t, y, 12.0, ambient=25.0).to_dict()
    shown = forecast(t, y, 12.0, ambient=25.0, shown=F).to_dict()
    assert len(plain.pop("warnings")) == len(shown.pop("warnings"))
    codes = [n["code"] for n in plain.pop("notes")]
    assert codes and codes == [n["code"] for n in shown.pop("notes")]
    assert shown == plain


def test_given_ambient_and_its_doubt():
    """The known-ambient note: the given 25 degC is 77 degF and 298.15 K; its default doubt,
    2.5 degC (1 sd), is 4.5 degF and 2.5 K; in degC the text is the one it always was."""
    t, y = _known_load()
    note = (
        "the given ambient {} is taken as uncertain by about {} (1 sd); the intervals include that"
    )
    expected = {
        None: note.format("25", "2.5"),
        F: note.format("77 °F", "4.5 °F"),
        K: note.format("298.15 K", "2.5 K"),
    }
    for unit, text in expected.items():
        fc = forecast(t, y, 12.0, ambient=25.0, shown=unit)
        assert text in fc.warnings, (unit, fc.warnings)


def _sawtooth(drift_per_s: float):
    """A healthy fridge's air between 2 and 5 degC (synth.compressor_sawtooth), plus a drift."""
    s = synth.compressor_sawtooth(0, corruption=Corruption(noise=0.05, quantum=0.1))
    return s.t, s.y + drift_per_s * (s.t - s.t[0])


@pytest.mark.parametrize("drift_c_per_h", [0.0, 0.75])
def test_cycling_note(drift_c_per_h):
    """The cycling note's mean is a point (mean * 9/5 + 32 in degF, to the 0.01 the degC text
    shows), its half swing and drift per hour are steps (* 9/5, to their two digits); in degC
    it prints the cycle means' numbers as before (.3g, .2g, +.2g)."""
    t, y = _sawtooth(drift_c_per_h / 3600.0)
    c = forecast(t, y, 8.0, limit="upper")
    f = forecast(t, y, 8.0, limit="upper", shown=F)
    assert c.pattern == f.pattern == "cycling"
    mean, half, drift = (c.params[k] for k in ("cycle_mean", "half_swing", "drift_per_s"))
    wc, wf = only(c.warnings, "cycle"), only(f.warnings, "cycle")
    assert f"around {mean:.3g} +- {half:.2g} over" in wc
    m_f, h_f = numbers(wf, rf"around {NUM} °F \+- {NUM} °F over")
    assert m_f == pytest.approx(mean * 9 / 5 + 32, abs=0.006)
    assert h_f == pytest.approx(half * 9 / 5, rel=0.05)
    if drift_c_per_h:
        assert f"drifts by {drift * 3600:+.2g} per hour" in wc
        (d_f,) = numbers(wf, rf"drifts by {NUM} °F per hour")
        assert d_f == pytest.approx(drift * 3600 * 9 / 5, rel=0.05)
        assert d_f == pytest.approx(0.75 * 9 / 5, rel=0.15)  # the drift put in, in degF per hour
    else:
        assert "drifts" not in wf


def test_few_readings_note():
    """Three readings against a given ambient: the assumed scatter (0.15 degC, 1 sd) is 0.27 degF
    and the default doubt of the ambient 4.5 degF; in degC, 0.15 and 2.5 as before."""
    t, y = _known_load()
    c = forecast(t[:3], y[:3], 12.0, ambient=25.0)
    f = forecast(t[:3], y[:3], 12.0, ambient=25.0, shown=F)
    assert c.rmse == pytest.approx(0.15)
    assert (
        "scatter taken as 0.15 (1 sd, not measured) and the ambient as uncertain by 2.5;"
        in only(c.warnings, "only 3 readings")
    )
    assert (
        "scatter taken as 0.27 °F (1 sd, not measured) and the ambient as uncertain by "
        "4.5 °F;" in only(f.warnings, "only 3 readings")
    )


def test_learned_prior_note():
    """The learned prior's ambient (mean and sd over past episodes) is a point and a step."""
    rng = np.random.default_rng(5)
    prior = Prior()
    for _ in range(8):
        prior = prior.updated(
            math.exp(0.12 * rng.standard_normal()) / 900.0, 11.0 + rng.normal(0.0, 1.0)
        )
    mu, sd = prior.ambient_prior()
    s = synth.lumped(
        3,
        T0=95.0,
        ambient=11.0,
        k_per_s=1 / 900,
        threshold=20.0,
        duration_s=240.0,
        dt_s=10.0,
        corruption=Corruption(noise=0.2),
    )
    wc = only(forecast(s.t, s.y, 20.0, prior=prior).warnings, "prior learned")
    wk = only(forecast(s.t, s.y, 20.0, prior=prior, shown=K).warnings, "prior learned")
    assert f"ambient about {mu:.3g} +- {sd:.2g})" in wc
    m_k, s_k = numbers(wk, rf"ambient about {NUM} K \+- {NUM} K\)")
    assert m_k == pytest.approx(mu + 273.15, abs=0.06)  # degC to 0.1 at .3g, so K to 0.1 too
    assert s_k == pytest.approx(sd, rel=0.05)


def _sphere():
    """A sphere's centre at 3 degC in 25 degC air, Bi 2, seen half-way in time to 8 degC."""
    return core_probe(
        3,
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


def test_conduction_steady_air_note():
    """A steady air probe beside a core probe: the mean it is carried forward at is a point, its
    standard error a step, through forecast() as through fit_conduction in a showing() block."""
    s = _sphere()
    rng = np.random.default_rng(3)
    at = np.sort(s.t)
    ay = np.round((25.0 + rng.normal(0.0, 0.1, at.size)) / 0.1) * 0.1
    plain = fit_conduction(s.t, s.y, "sphere", ambient_t=at, ambient_y=ay)
    assert plain.ambient_note.startswith("the ambient shows no trend")
    mean = float(np.mean(ay))
    assert f"at its mean {mean:.4g} (standard error" in plain.ambient_note
    (se_c,) = numbers(plain.ambient_note, rf"standard error {NUM}\)")
    fc = forecast(s.t, s.y, 8.0, model="sphere", ambient_t=at, ambient_y=ay, shown=F)
    with showing(F):
        direct = fit_conduction(s.t, s.y, "sphere", ambient_t=at, ambient_y=ay)
    w = only(fc.warnings, "no trend")
    assert w == direct.ambient_note
    m_f, se_f = numbers(w, rf"at its mean {NUM} °F \(standard error {NUM} °F\)")
    assert m_f == pytest.approx(mean * 9 / 5 + 32, abs=0.006)
    assert se_f == pytest.approx(se_c * 9 / 5, rel=0.05)


def test_conduction_held_ambient_note():
    """A core probe whose fitted ambient falls outside the plausible range is held at the bound:
    30 degC is 86 degF; in degC the note says 30 as before."""
    s = _sphere()
    c = fit_conduction(s.t, s.y, "sphere", ambient_bounds=(30.0, 60.0))
    with showing(F):
        f = fit_conduction(s.t, s.y, "sphere", ambient_bounds=(30.0, 60.0))
    assert "ambient not identifiable from the curvature; held at 30" in c.warnings
    assert "ambient not identifiable from the curvature; held at 86 °F" in f.warnings
    assert f.Ta == c.Ta == 30.0
