"""Cramer-Rao bound on the crossing time of a core-probe (centre) curve with a constant ambient.

    T(t) = Ta + (Ti - Ta) theta_centre(a (t - t0), Bi),   parameters p = (Ti, Ta, ln Bi, ln a)

With Gaussian reading noise sd sigma the Fisher information is  I = G'G / sigma^2  (G the model's
Jacobian at the true parameters, by central differences), plus 1 / sd_Ta^2 on Ta when the ambient
is measured independently (an air probe: sd_Ta = its noise / sqrt(its readings)).  By the delta
method  Var(eta) >= g' I^-1 g,  g = d eta / d p.  For benchmarks: how close an estimator comes to
the information the readings carry, and whether a target is reachable at all.
"""

from __future__ import annotations

import math

import numpy as np
from numpy.typing import ArrayLike
from thermeta.predictors.conduction import _Curve
from thermeta.predictors.conduction_eta import etas_constant


def crb_eta_sd(
    t_s: ArrayLike,
    geometry: str,
    *,
    t_i: float,
    ambient: float,
    biot: float,
    a_per_s: float,
    threshold: float,
    noise_sd: float,
    t0_s: float | None = None,
    ambient_sd: float | None = None,
    t_now: float | None = None,
) -> float:
    """Lower bound on the sd (seconds) of an unbiased crossing-time estimate from readings at
    ``t_s``.  ambient_sd: None = the ambient is fitted from the readings alone; 0 = known
    exactly; > 0 = measured independently to that sd.  inf when the bound is unbounded
    (parameters not identifiable) or the true curve does not cross."""
    if noise_sd <= 0 or biot <= 0 or a_per_s <= 0:
        raise ValueError("noise_sd, biot and a_per_s must be positive")
    t = np.sort(np.asarray(t_s, dtype=float))
    if t.size < 2:
        raise ValueError("need at least two reading times")
    start = float(t[0]) if t0_s is None else float(t0_s)
    span = max(float(t[-1] - start), 1.0)
    now = float(t[-1]) if t_now is None else float(t_now)
    curve = _Curve(geometry, "fitted", start, span, None, None, False)
    p = np.array([t_i, ambient, math.log(biot), math.log(a_per_s)])
    eta0 = float(etas_constant(curve, p, threshold, now)[0])
    if not math.isfinite(eta0) or eta0 <= 0.0:
        return math.inf
    jac = np.empty((t.size, p.size))
    grad = np.empty(p.size)
    for j in range(p.size):
        h = 1e-5 * max(1.0, abs(p[j]))
        dp = np.zeros(p.size)
        dp[j] = h
        jac[:, j] = (curve.full(p + dp, t) - curve.full(p - dp, t)) / (2 * h)
        e = etas_constant(curve, np.vstack([p + dp, p - dp]), threshold, now)
        grad[j] = (e[0] - e[1]) / (2 * h)
    if not np.all(np.isfinite(grad)):
        return math.inf
    info = jac.T @ jac / noise_sd**2
    keep = np.arange(p.size)
    if ambient_sd == 0.0:
        keep = np.array([0, 2, 3])
    elif ambient_sd is not None:
        info[1, 1] += 1.0 / ambient_sd**2
    sub, g = info[np.ix_(keep, keep)], grad[keep]
    try:
        var = float(g @ np.linalg.solve(sub, g))
    except np.linalg.LinAlgError:
        return math.inf
    if not math.isfinite(var) or np.linalg.cond(sub) > 1e14:
        return math.inf
    return math.sqrt(max(var, 0.0))
