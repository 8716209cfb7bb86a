"""Centre response of a conducting body to a time-varying ambient (Duhamel superposition).

With the centre's unit-step response S(t) = 1 - theta_centre(a t), an ambient Ta(t) that steps from
the body's uniform Ti to Ta(t0) at t0 and then varies continuously gives

    T(t) = Ti + (Ta(t0) - Ti) S(t - t0) + int_t0^t S(t - tau) Ta'(tau) dtau
         = Ti theta(t) + Ta(t0) (1 - theta(t)) + R(t)
    R(t) = (Ta(t) - Ta(t0)) - sum_n C_n v_n(t),
    v_n(t) = int_t0^t exp(-lam_n (t - tau)) Ta'(tau) dtau

with lam_n = zeta_n^2 a.  The initial step uses the exact (clamped) centre series; the ramp part R
takes the ambient as piecewise linear on a uniform grid, for which each mode's recursion is exact:

    v_n(tau_{k+1}) = d_n v_n(tau_k) + g_n s_k,   d_n = exp(-lam_n h),  g_n = (1 - d_n) / lam_n

(s_k the ambient's slope on step k), i.e. v_n(tau_k) = sum_{j<k} g_n d_n^(k-1-j) s_j, a
convolution; summed over the modes it is one convolution of the slopes with a single kernel.
R is then interpolated linearly between grid points.
"""

from __future__ import annotations

import math
from collections.abc import Callable

import numpy as np
from numpy.typing import NDArray
from thermeta.predictors.quantiles import f_sf

Float = NDArray[np.float64]
AmbientFn = Callable[[Float], Float]

GRID_STEPS = 256
MAX_GRID_STEPS = 4096
APPROACH_STARTS = 16  # exp_approach_fit: where the approach may start (readings, evenly)
MIN_AFTER_START = 6  # and the fewest readings after a start


def ramp_part(
    t_rel_s: Float,
    ambient_fn: AmbientFn,
    t0_s: float,
    a_per_s: float,
    zeta: Float,
    c: Float,
    step_s: float | None = None,
) -> Float:
    """R(t) above at times ``t_rel_s`` after t0 (0 before t0); ambient_fn takes absolute times."""
    t_end = float(np.max(t_rel_s)) if t_rel_s.size else 0.0
    if t_end <= 0.0:
        return np.zeros_like(t_rel_s)
    # A fixed step (not a fixed count) keeps R(t) the same however far the caller evaluates.
    h = step_s if step_s else t_end / GRID_STEPS
    h = max(h, t_end / MAX_GRID_STEPS)
    m = int(np.ceil(t_end / h - 1e-9))
    grid = np.arange(m + 1, dtype=np.float64) * h
    amb = ambient_fn(t0_s + grid)
    slope = np.diff(amb) / h
    lam = zeta * zeta * a_per_s
    # sum_n C_n v_n is linear in the slopes: one convolution with the summed kernel
    #   kappa[m] = sum_n C_n g_n d_n^m
    kappa = (c * -np.expm1(-lam * h) / lam) @ np.exp(-np.outer(lam * h, np.arange(m)))
    if m <= 512:
        conv = np.convolve(slope, kappa)
    else:  # scipy.signal costs about 1 s to import: only the long series pay it
        from scipy.signal import fftconvolve

        conv = fftconvolve(slope, kappa)
    sum_cv = np.concatenate([[0.0], conv[:m]])
    r_grid = (amb - amb[0]) - sum_cv
    return np.interp(t_rel_s, grid, r_grid, left=0.0)


def exp_approach_fit(t_s: Float, y: Float) -> tuple[float, float, float]:
    """Fit  Ta(t) = A + (B - A) exp(-k (t - t_last))  to an ambient series by a grid over k.

    Returns (A, B, k_per_s); k = 0 means a hold at the recent median (too few points or no trend
    worth extrapolating).  Separable: for each k the model is linear in (A, B).

    The approach may also start later than the first reading, the air level before it: an air
    held steady until its unit failed or a door opened, then heading to a new level (one more
    parameter, the start, on a grid of APPROACH_STARTS; an AIC step asks it a gain of
    exp(2 / n) in the residual sum).  Fitted from the first reading, such an air has no single
    exponential approach: the demo trailer's air, an hour into its rise toward +4 degC, was
    extrapolated toward 277 degC with a 30 h time constant (a straight ramp) and its large
    carton's crossing forecast 20 % early with a 90 % interval that missed it.
    """
    n = t_s.size
    if n < 6:
        med = float(np.median(y[-5:])) if n else float("nan")
        return med, med, 0.0
    x = t_s - t_s[-1]
    span = max(float(x[-1] - x[0]), 1.0)
    med = float(np.median(y[-5:]))
    # the bar an approach must clear: the hold's residual sum, less an AIC-style gain
    best = (float(np.sum((y - med) ** 2)) * math.exp(-4.0 / n), med, med, 0.0)
    ks = np.geomspace(0.05 / span, 30.0 / span, 40)
    starts = np.unique(np.linspace(0, n - MIN_AFTER_START, APPROACH_STARTS).round().astype(int))
    for i in starts:
        e = np.exp(-np.outer(ks, np.maximum(x - x[i], 0.0)))  # (k, reading)
        u = 1.0 - e
        # the normal equations of y = A u + C e (C the level at the start), every k at once
        suu, see, sue = (u * u).sum(1), (e * e).sum(1), (u * e).sum(1)
        suy, sey = u @ y, e @ y
        det = suu * see - sue**2
        with np.errstate(divide="ignore", invalid="ignore"):
            a = (see * suy - sue * sey) / det
            c = (suu * sey - sue * suy) / det
            rss = ((y[None, :] - a[:, None] * u - c[:, None] * e) ** 2).sum(1)
        rss = np.where((det > 1e-12 * suu * see) & np.isfinite(rss), rss, np.inf)
        score = rss * (math.exp(2.0 / n) if i > 0 else 1.0)
        j = int(np.argmin(score))
        if score[j] < best[0]:
            b_now = a[j] + (c[j] - a[j]) * math.exp(-ks[j] * (x[-1] - x[i]))
            best = (float(score[j]), float(a[j]), float(b_now), float(ks[j]))
    return best[1], best[2], best[3]


def steady_level(t_s: Float, y: Float, alpha: float = 0.01) -> tuple[float, float] | None:
    """(mean, standard error) when an ambient series shows no trend, else None.

    Two tests against a constant level, each an F test of the extra sum of squares (Gaussian
    noise): a straight line, F = (RSS0 - RSS1) / (RSS1 / (n - 2)) on (1, n - 2) dof, and the
    best exponential approach of :func:`exp_approach_fit`'s k grid, F on (2, n - 3) dof with a
    Bonferroni factor for the grid's size.  Steady when neither is significant at ``alpha``;
    a steady air is then carried forward at its mean instead of an extrapolated curve whose
    asymptote would wander with the noise.
    """
    n = int(t_s.size)
    if n < 6 or float(t_s[-1] - t_s[0]) <= 0.0:
        return None
    mean = float(np.mean(y))
    rss0 = float(np.sum((y - mean) ** 2))
    se = math.sqrt(rss0 / (n - 1) / n)
    if rss0 <= 1e-12 * max(1.0, mean * mean) * n:
        return mean, se  # every reading the same (a quantised, steady air)
    x = t_s - t_s[-1]
    span = float(x[-1] - x[0])
    slope, icept = np.polyfit(x / span, y, 1)
    rss1 = float(np.sum((y - (icept + slope * x / span)) ** 2))
    p_lin = float(f_sf((rss0 - rss1) / max(rss1 / (n - 2), 1e-300), 1, n - 2))
    ks = np.geomspace(0.05 / span, 30.0 / span, 40)
    rss2 = rss0
    for k in ks:
        e = np.exp(-k * x)
        a_mat = np.column_stack([1.0 - e, e])
        coef, *_ = np.linalg.lstsq(a_mat, y, rcond=None)
        rss2 = min(rss2, float(np.sum((y - a_mat @ coef) ** 2)))
    p_exp = min(
        1.0, ks.size * float(f_sf((rss0 - rss2) / 2.0 / max(rss2 / (n - 3), 1e-300), 2, n - 3))
    )
    if min(p_lin, p_exp) < alpha:
        return None
    return mean, se


def make_ambient_fn(
    amb_t: Float, amb_y: Float, future: AmbientFn | None = None
) -> tuple[AmbientFn, str]:
    """Ambient at any absolute time: linear between readings, held before the first, and beyond the
    last either ``future`` or an exponential-approach fit of the series.  Returns (fn, how)."""
    order = np.argsort(amb_t, kind="stable")
    at, ay = amb_t[order], amb_y[order]
    keep = np.isfinite(at) & np.isfinite(ay)
    at, ay = at[keep], ay[keep]
    if at.size == 0:
        raise ValueError("ambient series has no finite readings")
    t_end = float(at[-1])
    if future is not None:
        fut, how = future, "ambient beyond its last reading from the caller's extrapolation"
    else:
        a_inf, b_now, k = exp_approach_fit(at, ay)
        if k == 0.0:

            def fut(t: Float) -> Float:
                return np.full_like(t, b_now)

            how = "ambient held at its recent median beyond its last reading"
        else:

            def fut(t: Float) -> Float:
                return a_inf + (b_now - a_inf) * np.exp(-k * (t - t_end))

            how = "ambient extrapolated by its own exponential-approach fit"

    def fn(t: Float) -> Float:
        t = np.asarray(t, dtype=float)
        out = np.interp(t, at, ay)
        beyond = t > t_end
        if np.any(beyond):
            out[beyond] = fut(t[beyond])
        return out

    return fn, how
