"""Priors learned from past episodes: the penalised fit against scipy's least_squares, an early
forecast sped up by a right prior, a wrong prior overridden by the readings, cautious updating.

Truth: the closed form of Newton's law, T(t) = Ta + (T0 - Ta) e^(-k t) (the published law; the
generator is checked against scipy.integrate.solve_ivp in test_predictors_lumped.py)."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.optimize import least_squares
from thermeta.daemon.simulation import synth
from thermeta.daemon.simulation.synth import Corruption
from thermeta.predictors import forecast
from thermeta.predictors.lumped import fit_lumped
from thermeta.predictors.prior import SD_LOGK_FLOOR, Prior, learn, learnable

K_WORT = 1 / (15 * 60)  # wort through a plate chiller: tau 15 min (common practice: well under 1 h)
COOLANT_C = 11.0


def class_prior(
    k_per_s: float = K_WORT, ambient_c: float = COOLANT_C, n: int = 8, seed: int = 5
) -> Prior:
    """A prior learned from n episodes of one class: k within ~12 %, the coolant within ~1 degC."""
    rng = np.random.default_rng(seed)
    p = Prior()
    for _ in range(n):
        p = p.updated(
            k_per_s * math.exp(0.12 * rng.standard_normal()), ambient_c + rng.normal(0.0, 1.0)
        )
    return p


def wort(seed: int, duration_s: float, k_per_s: float = K_WORT) -> synth.Synth:
    return synth.lumped(
        seed,
        T0=95.0,
        ambient=COOLANT_C,
        k_per_s=k_per_s,
        threshold=20.0,
        duration_s=duration_s,
        dt_s=10.0,
        corruption=Corruption(noise=0.2),
    )


def rel_err(fc, s) -> float:
    return math.inf if fc.eta_s is None else abs(fc.eta_s - s.eta_true_s) / s.eta_true_s


def test_penalised_fit_is_the_map_estimate_of_least_squares():
    """Reference: scipy.optimize.least_squares on the augmented residuals
    [(y - f)/sigma, (ln k - mu)/sd_k, (a - mu_a)/sd_a] (the Gaussian MAP estimate) gives the same
    k and ambient as fit_lumped's penalised variable projection (sigma: the readings' noise)."""
    s = wort(3, 240.0)
    mu, sd, mu_a, sd_a = math.log(K_WORT * 1.3), 0.3, COOLANT_C + 1.5, 2.0
    sig = 0.2
    fit = fit_lumped(s.t, s.y, 20.0, ambient=mu_a, ambient_sd=sd_a, k_prior=(mu, sd), noise_sd=sig)
    assert fit.ok
    d = s.t - s.t[0]

    def resid(p):
        lk, a, b = p
        f = a + b * np.exp(-math.exp(lk) * d)
        return np.concatenate([(s.y - f) / sig, [(lk - mu) / sd, (a - mu_a) / sd_a]])

    sigma_used = fit.sigma  # the fit re-estimates sigma from its own residuals; use the same

    def resid_fit(p):
        r = resid(p)
        r[:-2] *= sig / sigma_used
        return r

    ref = least_squares(resid_fit, [mu, mu_a, s.y[0] - mu_a], xtol=1e-12, ftol=1e-12)
    assert math.exp(ref.x[0]) == pytest.approx(fit.k_per_s, rel=0.03)
    assert ref.x[1] == pytest.approx(fit.ambient, abs=0.3)


def test_no_prior_leaves_results_unchanged():
    """prior=None and a prior with no episodes give the identical forecast (no prior rows)."""
    s = wort(4, 600.0)
    a = forecast(s.t, s.y, 20.0, limit="lower")
    b = forecast(s.t, s.y, 20.0, limit="lower", prior=Prior())
    assert a.to_dict() == b.to_dict()
    assert not any("prior" in w for w in a.warnings)


def test_right_prior_gives_an_early_forecast_within_10_percent():
    """Two minutes into chilling (12 readings, little curvature) the fitted ambient is barely
    identifiable: without a prior most ETAs are off by more than 10 %; with the class's prior
    every one is within 10 % and its 90 % interval covers the truth."""
    prior = class_prior()
    without, with_, covered = [], [], 0
    for seed in range(10):
        s = wort(100 + seed, 120.0)
        f0 = forecast(s.t, s.y, 20.0, limit="lower", min_points=8)
        f1 = forecast(s.t, s.y, 20.0, limit="lower", min_points=8, prior=prior)
        without.append(rel_err(f0, s))
        with_.append(rel_err(f1, s))
        covered += f1.eta_lo_s <= s.eta_true_s <= (f1.eta_hi_s or math.inf)
        assert any("prior learned from 8 past episode" in w for w in f1.warnings)
    assert max(with_) < 0.10
    assert sum(e > 0.10 for e in without) >= 5
    assert covered >= 8


def test_wrong_prior_is_overridden_by_the_readings():
    """A prior from a different product (k 3 x too small, so tau 3 x too long) and a coolant 4 degC
    off: by half-way to the crossing the ETA is within 5 % anyway, and the forecast says the
    readings disagree with the prior."""
    wrong = class_prior(k_per_s=K_WORT / 3, ambient_c=COOLANT_C + 4.0)
    t_cross = math.log((95 - COOLANT_C) / (20 - COOLANT_C)) / K_WORT
    errs = []
    for seed in range(6):
        s = wort(200 + seed, 0.5 * t_cross)
        fc = forecast(s.t, s.y, 20.0, limit="lower", prior=wrong)
        errs.append(rel_err(fc, s))
        assert any("disagree with the learned prior" in w for w in fc.warnings)
    assert max(errs) < 0.05


def test_updates_are_cautious():
    """One episode gives a wide sd (shrunk toward the default); identical episodes never push the
    sd below its floor; after a few episodes one outlier moves the mean by at most 3 sd / n."""
    p1 = Prior().updated(K_WORT, COOLANT_C)
    assert p1.logk_sd > 0.5 and p1.ambient_sd_c > 2.0
    p = Prior()
    for _ in range(50):
        p = p.updated(K_WORT, COOLANT_C)
    # the pseudo-episodes keep sqrt(2 sd0^2 / (30 + 2)) of the default: 0.175 with sd0 0.7
    assert SD_LOGK_FLOOR <= p.logk_sd < 0.2
    mean0, sd0, n0 = p.logk_mean, p.logk_sd, p.n_episodes
    q = p.updated(K_WORT * 100.0, COOLANT_C)
    assert abs(q.logk_mean - mean0) <= 3 * sd0 / min(n0 + 1, 30) + 1e-12
    assert Prior.from_dict(q.to_dict()) == q
    with pytest.raises(ValueError):
        Prior().updated(-1.0)


def test_only_a_well_determined_fit_is_learned():
    """An early fit (k not pinned down) is not learnable; a fit over most of the curve is, and
    learning it moves the prior to its k and fitted ambient."""
    early = forecast(*_ty(wort(7, 90.0)), 20.0, limit="lower")
    late = forecast(*_ty(wort(7, 1800.0)), 20.0, limit="lower")
    assert not learnable(early)
    assert learnable(late)
    p = learn(None, late)
    assert p.n_episodes == 1 and p.k_per_s == pytest.approx(K_WORT, rel=0.05)
    assert p.ambient_mean_c == pytest.approx(COOLANT_C, abs=0.3)
    with pytest.raises(ValueError):
        learn(p, early)


def _ty(s: synth.Synth):
    return s.t, s.y
