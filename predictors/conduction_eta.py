"""Crossing times of a fitted core-probe curve, and their spread over the fit's uncertainty.

Constant ambient:  T(t) = thr  <=>  theta_centre(Fo) = (thr - Ta) / (Ti - Ta) =: theta*, solvable
only for 0 < theta* < theta(now) (theta falls monotonically from 1 to 0 at the centre); found by
bisection in Fo, vectorised over parameter draws.  Measured (time-varying) ambient: the curve is
stepped forward on a geometric grid and the first crossing refined with brentq.

Interval: the delta method by simulation (Krinsky-Robb): parameter vectors drawn from the fit's
sampling distribution (multivariate t, n - p degrees of freedom, scale s^2 (J'J)^-1) are pushed
through the exact, nonlinear crossing-time
map; the 5th and 95th percentiles bound the 90 % interval, and the upper end is unbounded when
more than 5 % of the draws never cross.
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING

import numpy as np
from numpy.typing import NDArray
from thermeta.predictors.conduction_series import (
    N_TERMS,
    centre_coefficients,
    eigenvalues,
    theta_centre,
    theta_from_modes,
)

if TYPE_CHECKING:
    from thermeta.predictors.conduction import _Curve

Float = NDArray[np.float64]
N_MEASURED_DRAWS = 60


def fo_at_theta(th: Float, bi: Float, geometry: str, fo_min: Float) -> Float:
    """Fo >= fo_min where theta_centre falls to th (0 < th < theta(fo_min)), per element."""
    # Terms needed beyond the smallest Fo searched: exp(-zeta_n^2 Fo) < 1e-13 once
    # zeta_n > sqrt(30 / Fo), and zeta_n > (n - 1) pi in every geometry.
    fo_floor = max(float(np.min(fo_min)), 1e-12)
    n_terms = int(min(N_TERMS, max(4, np.ceil(np.sqrt(30.0 / fo_floor) / np.pi) + 2)))
    zn = eigenvalues(geometry, bi, n_terms)
    cn = centre_coefficients(geometry, zn)
    z, c = zn[..., 0], cn[..., 0]
    # First-term inversion theta ~ C1 exp(-zeta1^2 Fo) as a start; widen until bracketed.
    guess = np.maximum(np.log(np.maximum(c, 1.0) / th) / (z * z), 0.0)
    lo = np.array(fo_min, dtype=float, copy=True)
    hi = np.maximum(lo, guess) * 2.0 + 0.05
    for _ in range(12):
        above = theta_from_modes(hi, zn, cn) > th
        if not np.any(above):
            break
        hi = np.where(above, hi * 3.0, hi)
    for _ in range(50):
        mid = 0.5 * (lo + hi)
        above = theta_from_modes(mid, zn, cn) > th
        lo = np.where(above, mid, lo)
        hi = np.where(above, hi, mid)
    return 0.5 * (lo + hi)


def etas_constant(curve: _Curve, p: Float, threshold: float, t_now: float) -> Float:
    """Seconds from t_now to the crossing for each row of parameters p (inf: never; 0: past)."""
    p = np.atleast_2d(p)
    n_lin = len(curve.linear_names)
    ti = p[:, 0]
    ta = p[:, 1] if curve.mode == "fitted" else np.full(len(p), float(curve.ambient or 0.0))
    bi = np.exp(p[:, n_lin])
    a = np.exp(p[:, n_lin + 1])
    t0 = curve.start_s + (p[:, n_lin + 2] * curve.span_s if curve.fit_start else np.zeros(len(p)))
    fo_now = np.maximum(a * (t_now - t0), 0.0)
    rising = ta > ti
    th_now = theta_centre(fo_now, bi, curve.geometry)
    v_now = ta + (ti - ta) * th_now
    with np.errstate(divide="ignore", invalid="ignore"):
        th_thr = (threshold - ta) / (ti - ta)
    past = np.where(rising, v_now >= threshold, v_now <= threshold)
    reach = (th_thr > 0.0) & (th_thr < th_now)
    out = np.full(len(p), math.inf)
    out[past] = 0.0
    go = ~past & reach
    if np.any(go):
        fo_x = fo_at_theta(th_thr[go], bi[go], curve.geometry, fo_now[go])
        out[go] = np.maximum(fo_x / a[go] + t0[go] - t_now, 0.0)
    return out


def eta_measured(curve: _Curve, p: Float, threshold: float, t_now: float, span_s: float) -> float:
    """Seconds from t_now to the first crossing with a time-varying ambient (inf: none seen)."""
    n_lin = len(curve.linear_names)
    a = math.exp(p[n_lin + 1])
    horizon = max(60.0 / a, 20.0 * span_s)
    # One ramp step for every evaluation here, so all of them see the same discretised curve.
    step = max(span_s / 256, (t_now - curve.t0(p[n_lin:]) + horizon) / 1024)
    grid = t_now + np.concatenate([[0.0], np.geomspace(max(span_s, 1.0) * 1e-3, horizon, 300)])
    v = curve.full(p, grid, step)
    v_now = float(v[0])
    # The direction of travel is where the curve heads: toward the far-ahead value.
    rising = v[-1] > v_now
    if (v_now >= threshold) if rising else (v_now <= threshold):
        return 0.0
    hit = np.nonzero((v >= threshold) if rising else (v <= threshold))[0]
    if hit.size == 0:
        return math.inf
    i = int(hit[0])
    fine = np.linspace(grid[i - 1], grid[i], 33)
    vf = curve.full(p, fine, step) - threshold
    j = (
        int(np.nonzero((vf >= 0) if rising else (vf <= 0))[0][0])
        if np.any((vf >= 0) if rising else (vf <= 0))
        else 32
    )
    if j == 0:
        return float(fine[0]) - t_now
    # Linear interpolation inside the last fine step.
    w = vf[j - 1] / (vf[j - 1] - vf[j]) if vf[j - 1] != vf[j] else 1.0
    return float(fine[j - 1] + w * (fine[j] - fine[j - 1])) - t_now


def etas(curve: _Curve, p: Float, threshold: float, t_now: float, span_s: float) -> Float:
    """Crossing times for each row of p, whatever the ambient mode."""
    p = np.atleast_2d(p)
    if curve.mode == "measured":
        return np.array([eta_measured(curve, row, threshold, t_now, span_s) for row in p])
    return etas_constant(curve, p, threshold, t_now)


def draw_params(
    p_hat: Float, cov: Float, n: int, dof: int | None = None, seed: int = 20260101
) -> Float | None:
    """Draws from the fit's sampling distribution: multivariate t with ``dof`` = n_points - p
    degrees of freedom (the noise sd is itself estimated) and scale ``cov``; normal if dof is
    None.  Seeded, so a refit of the same data gives the same interval."""
    if cov is None or not np.all(np.isfinite(cov)):
        return None
    rng = np.random.default_rng(seed)
    try:
        z = rng.multivariate_normal(np.zeros(p_hat.size), cov, size=n, method="eigh")
    except (np.linalg.LinAlgError, ValueError):
        return None
    if dof is not None and dof >= 1:
        z = z / np.sqrt(rng.chisquare(dof, size=n) / dof)[:, None]
    return p_hat + z


def quantiles_90(values: Float) -> tuple[float | None, float | None]:
    """(5th, 95th) percentiles; None for an infinite end (more than 5 % never cross)."""
    lo = np.quantile(values, 0.05, method="lower")
    hi = np.quantile(values, 0.95, method="higher")
    return (float(lo) if np.isfinite(lo) else None), (float(hi) if np.isfinite(hi) else None)
