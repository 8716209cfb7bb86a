"""The Cramer-Rao bound on a core probe's crossing time (predictors/conduction_crb.py)."""

from __future__ import annotations

import math

import numpy as np
import pytest
from thermeta.daemon.simulation.synth import Corruption
from thermeta.daemon.simulation.synth_conduction import core_probe
from thermeta.predictors.conduction import fit_conduction
from thermeta.predictors.conduction_crb import crb_eta_sd

TRUTH = {"t_i": 70.0, "ambient": 2.0, "biot": 2.0, "a_per_s": 1 / 30000, "threshold": 21.0}


def _case(seed: int):
    """Cooked food at 70 degC, sphere centre, 2 degC chiller, 0.2 degC noise, seen half-way."""
    return core_probe(
        seed,
        geometry="sphere",
        biot=2.0,
        a_per_s=1 / 30000,
        t_i=70.0,
        ambient=2.0,
        threshold=21.0,
        seen_fraction=0.5,
        dt_s=30.0,
        corruption=Corruption(noise=0.2),
    )


def test_bound_matches_the_spread_of_a_well_determined_fit():
    """With ~200 readings and the ambient known, maximum likelihood is near its asymptotic
    regime, where it attains the bound (asymptotic efficiency of maximum likelihood; standard
    theory, from memory): the sd of the crossing-time error over 30 seeded replicas is within
    0.7-1.4 of the bound, and the mean error is small against it."""
    errs = []
    for seed in range(30):
        s = _case(seed)
        fit = fit_conduction(s.t, s.y, "sphere", ambient=2.0, interval="draws")
        errs.append(fit.time_to_threshold(21.0)[0] - s.eta_true_s)
    bound = crb_eta_sd(s.t, "sphere", noise_sd=0.2, ambient_sd=0.0, **TRUTH)
    assert 0.7 <= float(np.std(errs, ddof=1)) / bound <= 1.4
    assert abs(float(np.mean(errs))) < 0.5 * bound


def test_bound_orders_by_what_is_known_of_the_ambient():
    """Knowing the ambient exactly gives the tightest bound, an independent measurement of it a
    looser one, fitting it from the readings alone the loosest; halving the noise halves the
    bound (the information scales as 1 / sigma^2)."""
    t = _case(0).t
    known = crb_eta_sd(t, "sphere", noise_sd=0.2, ambient_sd=0.0, **TRUTH)
    measured = crb_eta_sd(t, "sphere", noise_sd=0.2, ambient_sd=0.5, **TRUTH)
    free = crb_eta_sd(t, "sphere", noise_sd=0.2, ambient_sd=None, **TRUTH)
    assert known < measured < free
    assert crb_eta_sd(t, "sphere", noise_sd=0.1, ambient_sd=0.0, **TRUTH) == pytest.approx(
        known / 2, rel=1e-6
    )
    # a threshold beyond the ambient is never crossed: no finite bound
    assert (
        crb_eta_sd(t, "sphere", noise_sd=0.2, ambient_sd=0.0, **{**TRUTH, "threshold": 1.0})
        == math.inf
    )
