"""Baselines and limits for benchmarks and tests (not used by the live forecast).

- linear extrapolation of the last 30 minutes;
- an unweighted 3-parameter least-squares fit (scipy's curve_fit, no cleaning, no bounds);
- the Cramer-Rao lower bound on the crossing-time sd for the lumped model with Gaussian noise
  (ambient fitted, exactly known, or given with a known spread), and for the measured-air model
  (an air probe toward the outside, the load toward the air);
- the known-ambient two-reading solve for k.
All times in seconds, eta counted from the newest reading.
"""

from __future__ import annotations

import math
import warnings

import numpy as np
from scipy.optimize import OptimizeWarning, curve_fit


def linear_eta(
    t: np.ndarray, y: np.ndarray, threshold: float, window_s: float = 1800.0
) -> float | None:
    """Straight line through the last ``window_s`` of readings: eta = (thr - T_now) / slope."""
    o = np.argsort(t)
    t, y = np.asarray(t, float)[o], np.asarray(y, float)[o]
    sel = t >= t[-1] - window_s
    if sel.sum() < 2:
        return None
    slope, icpt = np.polyfit(t[sel] - t[-1], y[sel], 1)
    if slope == 0 or (icpt - threshold) * slope > 0:  # flat, or moving away from the threshold
        return None
    return float((threshold - icpt) / slope)


def lumped3(x: np.ndarray, T_now: float, k: float, ambient: float) -> np.ndarray:
    """T(x) = Ta + (T_now - Ta) e^(-k x), x = t - t_last."""
    return ambient + (T_now - ambient) * np.exp(-k * x)


def curve_fit_eta(t: np.ndarray, y: np.ndarray, threshold: float) -> float | None:
    """Plain 3-parameter least squares (curve_fit, unweighted) and its crossing time."""
    o = np.argsort(t)
    t, y = np.asarray(t, float)[o], np.asarray(y, float)[o]
    x = t - t[-1]
    span = max(-x[0], 1.0)
    p0 = [y[-1], 1.0 / span, y[-1] + 2.0 * (y[-1] - y[0])]
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", OptimizeWarning)
            (T_now, k, amb), _ = curve_fit(lumped3, x, y, p0=p0, maxfev=4000)
    except (RuntimeError, ValueError):
        return None
    return eta_lumped(T_now, k, amb, threshold)


def eta_lumped(T_now: float, k: float, ambient: float, threshold: float) -> float | None:
    """eta = ln((T_now - Ta) / (thr - Ta)) / k, None when thr is not between T_now and Ta."""
    r = (threshold - ambient) / (T_now - ambient) if T_now != ambient else math.nan
    if not (0 < r < 1) or k <= 0:
        return None
    return -math.log(r) / k


def crb_eta_sd(
    t: np.ndarray, T_now: float, k: float, ambient: float, threshold: float, sigma: float
) -> float:
    """Cramer-Rao bound on sd(eta) for T(x) = Ta + (T_now - Ta) e^(-k x), Gaussian noise sigma.

    J = (1/sigma^2) sum grad f grad f' over the readings t, parameters (T_now, k, Ta) at their
    true values (the ambient fitted); Var(eta) >= g' J^-1 g, g = grad eta (delta method).
    """
    return _crb(t, T_now, k, ambient, threshold, sigma, fitted=True)


def crb_eta_sd_known(
    t: np.ndarray, T_now: float, k: float, ambient: float, threshold: float, sigma: float
) -> float:
    """The same bound with the ambient known exactly (parameters T_now, k)."""
    return _crb(t, T_now, k, ambient, threshold, sigma, fitted=False)


def crb_eta_sd_given(
    t: np.ndarray,
    T_now: float,
    k: float,
    ambient: float,
    threshold: float,
    sigma: float,
    ambient_sd: float,
) -> float:
    """The bound with the ambient given to within ``ambient_sd`` (1 sd): the three-parameter
    information plus 1 / ambient_sd^2 on the ambient, as a Gaussian prior adds it (a Bayesian
    bound in the sense of Van Trees, with the prior's information taken at its centre)."""
    return _crb(t, T_now, k, ambient, threshold, sigma, fitted=True, ambient_sd=ambient_sd)


def _crb(
    t, T_now, k, ambient, threshold, sigma, fitted: bool, ambient_sd: float | None = None
) -> float:
    x = np.asarray(t, float) - float(np.max(t))
    e = np.exp(-k * x)
    # df/dT_now = e;  df/dk = -(T_now - Ta) x e;  df/dTa = 1 - e
    cols = [e, -(T_now - ambient) * x * e] + ([1.0 - e] if fitted else [])
    G = np.column_stack(cols)
    J = G.T @ G / sigma**2
    if fitted and ambient_sd is not None and ambient_sd > 0:
        J[2, 2] += 1.0 / ambient_sd**2
    # eta = [ln(T_now - Ta) - ln(thr - Ta)] / k
    u, v = T_now - ambient, threshold - ambient
    if u == 0 or v / u <= 0 or v / u >= 1:
        return math.inf
    eta = math.log(u / v) / k
    g = np.array([1.0 / (k * u), -eta / k] + ([(-1.0 / u + 1.0 / v) / k] if fitted else []))
    try:
        return math.sqrt(max(float(g @ np.linalg.solve(J, g)), 0.0))
    except np.linalg.LinAlgError:
        return math.inf


def two_reading_k(t1: float, y1: float, t2: float, y2: float, ambient: float) -> float | None:
    """k from two readings with the ambient known: k = ln((T1 - Ta) / (T2 - Ta)) / (t2 - t1)."""
    if t2 == t1:
        return None
    r = (y1 - ambient) / (y2 - ambient) if y2 != ambient else math.nan
    if not (r > 0) or not math.isfinite(r):
        return None
    k = math.log(r) / (t2 - t1)
    return k if k > 0 else None


def two_reading_eta(
    t: np.ndarray, y: np.ndarray, ambient: float, threshold: float, gap_s: float | None = None
) -> float | None:
    """Known-ambient two-reading forecast: k from the first and newest readings (or the reading
    ``gap_s`` before the newest), then eta from the newest reading."""
    o = np.argsort(t)
    t, y = np.asarray(t, float)[o], np.asarray(y, float)[o]
    i = 0 if gap_s is None else int(np.searchsorted(t, t[-1] - gap_s))
    i = min(i, t.size - 2)
    k = two_reading_k(t[i], y[i], t[-1], y[-1], ambient)
    if k is None:
        return None
    return eta_lumped(y[-1], k, ambient, threshold)


def air_load(
    x: np.ndarray, outside: float, air0: float, k_air: float, load0: float, k_load: float
) -> tuple[np.ndarray, np.ndarray]:
    """Air toward the outside, the load toward the air (x from the first reading):

    a(x) = O + (a0 - O) e^(-ka x),  dT/dx = -kl (T - a(x))
    => T(x) = O + B e^(-ka x) + (T0 - O - B) e^(-kl x),  B = kl (a0 - O) / (kl - ka).
    """
    air = outside + (air0 - outside) * np.exp(-k_air * x)
    if abs(k_load - k_air) < 1e-9 * max(k_air, k_load):
        k_load = k_air * (1 + 1e-6)  # the a -> b limit, numerically
    b = k_load * (air0 - outside) / (k_load - k_air)
    load = outside + b * np.exp(-k_air * x) + (load0 - outside - b) * np.exp(-k_load * x)
    return air, load


def crb_eta_sd_air(
    t_load: np.ndarray,
    t_air: np.ndarray,
    theta: dict,
    threshold: float,
    sigma_load: float,
    sigma_air: float,
    t0: float,
) -> float:
    """Cramer-Rao bound on sd(eta) for the measured-air model, both probes observed with
    Gaussian noise; parameters (O, a0, ka, T0, kl) as in :func:`air_load`, t0 the curves' origin.

    J = sum over both probes of grad f grad f' / sigma^2 (central differences in the parameters,
    relative steps); eta from the first crossing after the newest load reading and its gradient
    by implicit differentiation, d eta = -(dT/dtheta) / (dT/dx) at the crossing.
    """
    keys = ("outside", "air0", "k_air", "load0", "k_load")
    p = np.array([float(theta[k]) for k in keys])
    xl, xa = np.asarray(t_load, float) - t0, np.asarray(t_air, float) - t0
    x_last = float(np.max(xl))
    cross = _first_crossing(p, keys, x_last, threshold)
    if cross is None:
        return math.inf
    h = np.maximum(np.abs(p) * 1e-6, 1e-9)
    g_obs, g_cross = [], []
    for i in range(p.size):
        up, dn = p.copy(), p.copy()
        up[i] += h[i]
        dn[i] -= h[i]
        fu = air_load(np.concatenate([xa, xl, [cross]]), **dict(zip(keys, up)))
        fd = air_load(np.concatenate([xa, xl, [cross]]), **dict(zip(keys, dn)))
        da, dl = (fu[0] - fd[0]) / (2 * h[i]), (fu[1] - fd[1]) / (2 * h[i])
        g_obs.append(np.concatenate([da[: xa.size] / sigma_air, dl[xa.size : -1] / sigma_load]))
        g_cross.append(dl[-1])
    G = np.column_stack(g_obs)
    dx = max(cross * 1e-6, 1e-3)
    base = dict(zip(keys, p))
    slope = (
        air_load(np.array([cross + dx]), **base)[1][0]
        - air_load(np.array([cross - dx]), **base)[1][0]
    ) / (2 * dx)
    if slope == 0:
        return math.inf
    g = -np.asarray(g_cross) / slope
    scale = np.where(p != 0, np.abs(p), 1.0)  # solve in relative units: the ks are ~1e-4
    Js = (G * scale).T @ (G * scale)
    gs = g * scale
    try:
        return math.sqrt(max(float(gs @ np.linalg.solve(Js, gs)), 0.0))
    except np.linalg.LinAlgError:
        return math.inf


def _first_crossing(p: np.ndarray, keys, x_last: float, threshold: float) -> float | None:
    """The load's first crossing of ``threshold`` after ``x_last`` (from the curves' origin)."""
    from scipy.optimize import brentq

    kw = dict(zip(keys, p))
    slow = 1.0 / min(kw["k_air"], kw["k_load"])
    grid = x_last + np.concatenate([[0.0], np.geomspace(1e-4 * slow, 100 * slow, 2000)])
    g = air_load(grid, **kw)[1] - threshold
    hit = np.flatnonzero(np.sign(g[1:]) != np.sign(g[0]))
    if g[0] == 0:
        return x_last
    if not hit.size:
        return None
    return float(
        brentq(
            lambda x: air_load(np.array([x]), **kw)[1][0] - threshold,
            grid[hit[0]],
            grid[hit[0] + 1],
            xtol=1e-6,
        )
    )
