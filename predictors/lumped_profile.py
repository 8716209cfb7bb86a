"""The lumped fit's algebra: closed-form sums per k, and the profile-likelihood intervals.

With d = t - t_first, e = e^(-k d) and the readings centred on their mean, the model
T = a + b e is linear in (a, b) for each k, so the residual sum of squares and its minimiser
come from the sums n, Sy, Syy, Se, See, Sye (computed for a whole grid of k in one product).
The 90 % intervals are profile-likelihood intervals,

    {theta : RSS_profile(theta) <= RSS_min (1 + F(0.90; 1, dof) / dof)},

for k from the profile RSS_k on a grid, for the ambient a and the crossing time eta from the
projection of the joint region {RSS <= cut}, an ellipse in (a, b) for each k, in closed form
(the crossing enters through the linear constraint a + b e^(-k (D + eta)) = threshold).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np
from thermeta.predictors.quantiles import f_ppf

if TYPE_CHECKING:
    from thermeta.predictors.lumped import LumpedFit

CONF = 0.90


@dataclass
class Sums:
    """Sufficient statistics of (d, y - ybar) for a vector of k values."""

    k: np.ndarray
    n: int
    Sy: float
    Syy: float
    Se: np.ndarray
    See: np.ndarray
    Sye: np.ndarray


def sums(d: np.ndarray, yc: np.ndarray, k: np.ndarray) -> Sums:
    """Se = sum e, See = sum e^2, Sye = sum y e with e = e^(-k d), for each k."""
    k = np.atleast_1d(np.asarray(k, float))
    E = np.exp(-np.outer(k, d))
    return Sums(k, d.size, float(yc.sum()), float(yc @ yc), E.sum(1), (E * E).sum(1), E @ yc)


def rss_of(s: Sums, a: np.ndarray, b: np.ndarray, lam: float, a0: float) -> np.ndarray:
    """RSS = sum (y - a - b e)^2 + lam (a - a0)^2, expanded in the sums."""
    with np.errstate(over="ignore", invalid="ignore"):
        r = s.Syy - 2 * a * s.Sy - 2 * b * s.Sye + s.n * a * a + 2 * a * b * s.Se + b * b * s.See
        if math.isfinite(lam) and lam > 0:
            r = r + lam * (a - a0) ** 2
    return np.where(np.isnan(r), np.inf, np.maximum(r, 0.0))


def solve_fixed_k(s: Sums, lam: float, a0: float, lo: float, hi: float):
    """Best (a, b) for each k: normal equations [[n+lam, Se], [Se, See]] [a, b] = [Sy+lam a0, Sye];
    a clipped to [lo, hi] (the problem is convex, so clipping then re-solving b is exact)."""
    if math.isinf(lam):
        a = np.full(s.k.shape, np.clip(a0, lo, hi))
    else:
        det = (s.n + lam) * s.See - s.Se**2
        with np.errstate(divide="ignore", invalid="ignore"):
            a = (s.See * (s.Sy + lam * a0) - s.Se * s.Sye) / det
        a = np.clip(np.nan_to_num(a, nan=a0), lo, hi)
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        b = (s.Sye - a * s.Se) / s.See
    return a, b, rss_of(s, a, b, lam, a0)


def normal_inverse(s: Sums, lam: float):
    """Entries of M^-1, M = [[n+lam, Se], [Se, See]] the Hessian/2 of the objective in (a, b).
    With a fixed (lam = inf) only b is free: m11 = m12 = 0, m22 = 1/See.  ``lam`` may be an
    array (one per row of sums, for many items at once: predictors/batch.py)."""
    if np.ndim(lam):
        fixed = np.isinf(lam)
        free = np.where(fixed, 0.0, lam)
        det = (s.n + free) * s.See - s.Se**2
        with np.errstate(divide="ignore", invalid="ignore"):
            m11, m12, m22 = s.See / det, -s.Se / det, (s.n + free) / det
            m22 = np.where(fixed, 1 / s.See, m22)
            return np.where(fixed, 0.0, m11), np.where(fixed, 0.0, m12), m22
    if math.isinf(lam):
        z = np.zeros_like(s.See)
        return z, z, 1.0 / s.See
    det = (s.n + lam) * s.See - s.Se**2
    with np.errstate(divide="ignore", invalid="ignore"):
        return s.See / det, -s.Se / det, (s.n + lam) / det


def eta_sets(
    s: Sums, a: np.ndarray, b: np.ndarray, delta: np.ndarray, thr: float, D: float, lam: float
) -> tuple[np.ndarray, np.ndarray]:
    """Per k, the crossing times eta >= 0 of curves inside {RSS(k, a, b) <= RSS_k + delta}.

    For fixed k the objective is quadratic in (a, b) with Hessian/2 M, so the constrained minimum
    on the line a + b c = thr (c = e^(-k (D + eta))) exceeds RSS_k by
    (a_k + b_k c - thr)^2 / g'M^-1 g, g = (1, c).  Hence eta is inside iff
        (b_k c + a_k - thr)^2 <= delta (m11 + 2 m12 c + m22 c^2),
    a quadratic inequality in c.  c <= 0 means a curve levelling off short of the threshold
    (eta = inf); c >= e^(-k D) means already past (eta = 0).  Returns (lo, hi), NaN where empty.
    """
    m11, m12, m22 = normal_inverse(s, lam)
    al, be = a - thr, b
    A2 = be * be - delta * m22
    B2 = al * be - delta * m12
    C2 = al * al - delta * m11
    cmax = np.exp(-s.k * D)
    disc = B2 * B2 - A2 * C2
    sq = np.sqrt(np.maximum(disc, 0.0))
    with np.errstate(divide="ignore", invalid="ignore"):
        r1, r2 = (-B2 - sq) / A2, (-B2 + sq) / A2
    rl, ru = np.minimum(r1, r2), np.maximum(r1, r2)
    inf = np.full(rl.shape, np.inf)
    up, real = A2 > 0, disc >= 0
    # A2 > 0: [rl, ru], empty if disc < 0.  A2 <= 0: (-inf, rl] U [ru, inf), or all c if disc < 0.
    l1 = np.where(up, np.where(real, rl, inf), -inf)
    u1 = np.where(up, np.where(real, ru, -inf), np.where(real, rl, inf))
    l2 = np.where(up | ~real, inf, ru)
    u2 = np.where(up | ~real, -inf, inf)
    lo_eta = np.full(s.k.shape, np.nan)
    hi_eta = np.full(s.k.shape, np.nan)
    for cl, cu in ((l1, u1), (l2, u2)):
        cu = np.minimum(cu, cmax)
        valid = (cl <= cu) & (delta >= 0)
        with np.errstate(divide="ignore", invalid="ignore"):
            # eta = -ln(c)/k - D falls as c grows: the top of the c range is the earliest crossing
            e_lo = np.where(
                cu >= cmax,
                0.0,
                np.where(cu <= 0, np.inf, -np.log(np.maximum(cu, 1e-300)) / s.k - D),
            )
            e_hi = np.where(cl <= 0, np.inf, -np.log(np.maximum(cl, 1e-300)) / s.k - D)
        lo_eta = np.where(valid, np.fmin(lo_eta, e_lo), lo_eta)
        hi_eta = np.where(valid, np.fmax(hi_eta, e_hi), hi_eta)
    return np.maximum(lo_eta, 0.0), hi_eta


def interval_from_profile(x: np.ndarray, prof: np.ndarray, cut: float, x_hat: float):
    """Ends of the connected set {prof <= cut} around x_hat on a sorted grid, linearly
    interpolated; None for an end that reaches the grid's edge (unbounded)."""
    ok = prof <= cut
    if not ok.any():
        return x_hat, x_hat
    i0 = int(np.argmin(np.abs(x - x_hat)))
    if not ok[i0]:
        i0 = int(np.argmin(prof))
    lo_i = i0
    while lo_i > 0 and ok[lo_i - 1]:
        lo_i -= 1
    hi_i = i0
    while hi_i < x.size - 1 and ok[hi_i + 1]:
        hi_i += 1

    def cross(i_in: int, i_out: int) -> float:
        p_in, p_out = prof[i_in], prof[i_out]
        if not np.isfinite(p_out) or p_out == p_in:
            return float(x[i_in])
        w = (cut - p_in) / (p_out - p_in)
        return float(x[i_in] + w * (x[i_out] - x[i_in]))

    lo = None if lo_i == 0 else cross(lo_i, lo_i - 1)
    hi = None if hi_i == x.size - 1 else cross(hi_i, hi_i + 1)
    return lo, hi


class KPenalty:
    """lam_k (ln k - mu)^2 with lam_k = sigma^2 / sd^2, in RSS units; zero without a prior."""

    def __init__(self, k_prior: tuple[float, float] | None, sigma: float = 0.0):
        self.k_prior = k_prior
        self.sigma = sigma

    def __call__(self, k: np.ndarray) -> np.ndarray:
        k = np.atleast_1d(np.asarray(k, float))
        if self.k_prior is None or self.sigma <= 0:
            return np.zeros(k.shape)
        mu, sd = self.k_prior
        with np.errstate(divide="ignore"):
            return (self.sigma / sd) ** 2 * (np.log(k) - mu) ** 2


def add_intervals(
    fit: LumpedFit, d, yc, thr, lam, a0, lo, hi, ybar, k_coarse, pen: KPenalty | None = None
) -> None:
    """90 % profile-likelihood intervals for k, the ambient and the crossing time.

    k: the varpro profile RSS_k on a grid, refined near k_hat.  Ambient and crossing time: the
    projection of the joint region {RSS <= cut}, exact for each k (an ellipse in (a, b)), taken
    over the k grid.  The cut's margin is widened by ``fit.inflate`` (n / n_eff for correlated
    residuals: each reading then carries less than one reading's worth of information).
    """
    D = float(d[-1])
    pen = pen or KPenalty(None)
    cut = fit.rss * (1.0 + fit.inflate * f_ppf(CONF, 1, fit.dof) / fit.dof)
    k_hat, lk = fit.k_per_s, math.log(fit.k_per_s)
    # curvature of RSS in log k sets a fine grid around k_hat
    s3 = sums(d, yc, np.exp(lk + np.array([-0.01, 0.0, 0.01])))
    r3 = solve_fixed_k(s3, lam, a0, lo, hi)[2] + pen(s3.k)
    curv = (r3[0] + r3[2] - 2 * r3[1]) / 0.01**2
    hw = math.sqrt(2 * (cut - fit.rss) / curv) if curv > 0 else 3.0
    hw = min(max(hw, 1e-5), 3.0)
    fine = np.exp(lk + np.linspace(-4 * hw, 4 * hw, 61))
    k_all = np.unique(np.concatenate([k_coarse, fine, [k_hat]]))
    s = sums(d, yc, k_all)
    r_k = solve_fixed_k(s, lam, a0, lo, hi)[2] + pen(k_all)
    fit.k_lo, fit.k_hi = interval_from_profile(k_all, r_k, cut, k_hat)
    if fit.k_lo is None:
        fit.k_lo = 0.0
    inside = r_k <= cut
    if not inside.any():
        inside = k_all == k_hat
    # unclipped optimum per k: the centre of the ellipse
    a_u, b_u, r_u = solve_fixed_k(s, lam, a0, -np.inf, np.inf)
    r_u = r_u + pen(k_all)
    delta = np.where(inside, cut - r_u, -1.0)
    if math.isinf(lam):
        fit.ambient_lo = fit.ambient_hi = fit.ambient
    else:
        m11 = normal_inverse(s, lam)[0]
        with np.errstate(invalid="ignore", over="ignore"):
            w = np.sqrt(np.maximum(np.nan_to_num(np.maximum(delta, 0.0) * m11, nan=0.0), 0.0))
        sel = (delta >= 0) & np.isfinite(w)
        if not sel.any():
            sel = k_all == k_hat
        fit.ambient_lo = float(max(np.min((a_u - w)[sel]), lo) + ybar)
        fit.ambient_hi = float(min(np.max((a_u + w)[sel]), hi) + ybar)
    if fit.eta_s == 0.0:
        fit.eta_lo_s = fit.eta_hi_s = 0.0
        return
    e_lo, e_hi = eta_sets(s, a_u, b_u, delta, thr, D, lam)
    if np.all(np.isnan(e_lo)):
        fit.eta_lo_s = fit.eta_hi_s = None
        return
    fit.eta_lo_s = float(np.nanmin(e_lo))
    hi_e = float(np.nanmax(e_hi))
    fit.eta_hi_s = None if math.isinf(hi_e) else hi_e
    if fit.eta_s is not None:
        fit.eta_lo_s = min(fit.eta_lo_s, fit.eta_s)
        if fit.eta_hi_s is not None:
            fit.eta_hi_s = max(fit.eta_hi_s, fit.eta_s)
