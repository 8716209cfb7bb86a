"""Measured ambient: the item follows an air probe, dT/dt = -k (T - Ta(t)).

Fit: with Ta linear between air readings, each step of length h is solved exactly,

    T_i = E T_(i-1) + u_i,   E = e^(-k h),   u_i = A1 - A0 E - (m / k)(1 - E),   m = (A1 - A0) / h,

so T(t_i) = T0 P_i + G_i(k) with P_i = e^(-k (t_i - t_0)): linear in T0, one-dimensional in k
(variable projection again).  Forecast: the air is extrapolated by its own lumped fit toward its
own asymptote, Ta(x) = Tout + (A_now - Tout) e^(-ka x), and then

    T(x) = Tout + A e^(-ka x) + (T_now - Tout - A) e^(-k x),   A = k (A_now - Tout) / (k - ka).

Interval: percentiles of the crossing time over parametric draws from the covariances of both
fits (load: T_now, log k; air: Tout, amplitude, log ka), taken as independent.

Few readings (a logger's gaps): two load readings determine T0 and k against the air, their
scatter then assumed (few.assumed_scatter); four air readings give the air's curve with an
assumed scatter, two or three its straight trend (the early extreme; the late end open).  Across
a gap in the air readings the air follows its own fitted curve, not a straight line.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy.optimize import brentq, minimize_scalar
from thermeta.predictors.few import assumed_scatter
from thermeta.predictors.lumped import KD_MAX, KD_MIN, LumpedFit
from thermeta.predictors.measured_air import FewAir, k_band
from thermeta.predictors.outcome import Reason

Z90 = 1.6448536269514722
N_DRAWS = 300
DRAW_SEED = 20_261_201  # fixed, so a forecast is a pure function of its readings
MIN_LOAD = 2  # T0 and k: two readings against the measured air determine them
MIN_MEASURED_SCATTER = 4  # below this the residuals cannot measure the scatter: it is assumed


def response(k: np.ndarray, s: np.ndarray, A: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """P (K, M) and G (K, M): the response at grid s to T0 = 1 with zero air, and to the air A
    (piecewise linear) with T0 = 0.  T_i = P_i (T0 + sum_j u_j / P_j)."""
    k = np.atleast_1d(k)[:, None]
    h = np.diff(s)[None, :]
    E = np.exp(-k * h)
    m = np.diff(A)[None, :] / h
    u = A[None, 1:] - A[None, :-1] * E - (m / k) * (1.0 - E)
    x = (s - s[0])[None, :]
    P = np.exp(-k * x)
    G = np.concatenate(
        [np.zeros((k.shape[0], 1)), P[:, 1:] * np.cumsum(u / P[:, 1:], axis=1)], axis=1
    )
    return P, G


@dataclass
class MeasuredFit:
    ok: bool
    reason: str | None = None
    code: Reason | None = None  # why there is no fit
    k_per_s: float = math.nan
    k_se: float = math.nan
    T0: float = math.nan
    value_fit_now: float = math.nan
    rss: float = math.nan
    sigma: float = math.nan
    n: int = 0
    air: LumpedFit | None = None
    eta_s: float | None = None
    eta_lo_s: float | None = None
    eta_hi_s: float | None = None
    k_lo: float | None = None
    k_hi: float | None = None
    direction: str | None = None
    residuals: np.ndarray | None = None


def load_after(
    x: np.ndarray, T_now: float, k: float, air_now: float, out: float, ka: float
) -> np.ndarray:
    """T(x) for x >= 0 seconds after the newest reading, air extrapolated by its own fit."""
    x = np.asarray(x, float)
    if abs(k - ka) < 1e-9 * k:
        return out + (T_now - out) * np.exp(-k * x) + k * (air_now - out) * x * np.exp(-k * x)
    A = k * (air_now - out) / (k - ka)
    return out + A * np.exp(-ka * x) + (T_now - out - A) * np.exp(-k * x)


def first_crossing(
    T_now: float,
    k: float,
    air_now: float,
    out: float,
    ka: float,
    thr: float,
    past: bool,
    slow: float | None = None,
) -> float | None:
    """Seconds until T(x) first reaches thr (0 if ``past``, None if never); searched up to 60
    ``slow`` (default: the slower of the two time constants)."""
    if past or T_now == thr:
        return 0.0
    if slow is None:
        slow = 1.0 / max(min(k, ka if ka > 0 else k), 1e-12)
    x = np.concatenate([[0.0], np.geomspace(1e-4 * slow, 60 * slow, 240)])
    g = load_after(x, T_now, k, air_now, out, ka) - thr
    hit = np.flatnonzero(np.sign(g[1:]) != np.sign(g[0]))
    if hit.size == 0:
        return None
    i = int(hit[0])
    return float(
        brentq(
            lambda z: float(load_after(np.array([z]), T_now, k, air_now, out, ka)[0] - thr),
            x[i],
            x[i + 1],
            xtol=1e-3,
        )
    )


def fit_measured(
    t: np.ndarray,
    y: np.ndarray,
    air_t: np.ndarray,
    air_y: np.ndarray,
    threshold: float,
    *,
    air_fit: LumpedFit,
    limit: str | None = None,
    air_spread: LumpedFit | None = None,
) -> MeasuredFit:
    """Fit k and T0 with the measured air; forecast with the air's own fit ``air_fit``."""
    n = t.size
    if n < MIN_LOAD:
        return MeasuredFit(
            False, f"too few readings to fit ({n})", n=n, code=Reason.TOO_FEW_READINGS
        )
    inside = (air_t >= t[0]) & (air_t <= t[-1])
    s = gap_grid(np.unique(np.concatenate([t, air_t[inside]])), air_t)
    A = air_input(s, air_t, air_y, air_spread if air_spread is not None else air_fit)
    beyond = s > air_t[-1]
    if beyond.any() and air_fit.ok:  # after the last one, the air's own curve
        A[beyond] = air_fit.curve(s[beyond])
    pos = np.searchsorted(s, t)
    D = float(t[-1] - t[0])
    if D <= 0:
        return MeasuredFit(False, "all readings at one instant", n=n, code=Reason.ONE_INSTANT)

    def rss_k(k: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        P, G = response(k, s, A)
        P, G = P[:, pos], G[:, pos]
        r = y[None, :] - G
        T0 = (r * P).sum(1) / (P * P).sum(1)  # linear in T0
        return ((r - T0[:, None] * P) ** 2).sum(1), T0

    grid = np.geomspace(KD_MIN, KD_MAX, 48) / D
    r0, _ = rss_k(grid)
    i = int(np.argmin(r0))
    lg = np.log(grid)
    res = minimize_scalar(
        lambda v: float(rss_k(np.array([math.exp(v)]))[0][0]),
        bounds=(lg[max(i - 1, 0)], lg[min(i + 1, lg.size - 1)]),
        method="bounded",
        options={"xatol": 1e-7},
    )
    k = float(math.exp(res.x))
    rr, T0s = rss_k(np.array([k]))
    rss, T0 = float(rr[0]), float(T0s[0])
    P, G = response(np.array([k]), s, A)
    fitted = T0 * P[0, pos] + G[0, pos]
    dof = max(n - 2, 1)
    sigma = math.sqrt(rss / dof)
    if n < MIN_MEASURED_SCATTER:
        # two or three readings cannot measure their own scatter: take the assumed one
        sigma = max(sigma, assumed_scatter(y))
    # covariance of (T0, log k) from the Jacobian (finite difference in log k)
    hstep = 1e-4
    P2, G2 = response(np.array([k * math.exp(hstep)]), s, A)
    dlogk = ((T0 * P2[0, pos] + G2[0, pos]) - fitted) / hstep
    J = np.column_stack([P[0, pos], dlogk])
    cov = np.linalg.pinv(J.T @ J) * sigma**2
    fit = MeasuredFit(
        True,
        k_per_s=k,
        T0=T0,
        value_fit_now=float(fitted[-1]),
        rss=rss,
        sigma=sigma,
        n=n,
        air=air_fit,
        residuals=y - fitted,
    )
    se_logk = math.sqrt(max(cov[1, 1], 0.0))
    fit.k_se = k * se_logk
    fit.k_lo, fit.k_hi = k_band(k, se_logk)
    if not air_fit.ok:
        return fit
    # the air's own curve at the load's newest reading (the air may have stopped earlier)
    t_now = max(float(t[-1]), air_fit.t_last)
    air_now = float(air_fit.curve(np.array([t_now]))[0])
    out, ka = air_fit.ambient, air_fit.k_per_s
    rising = out > fit.value_fit_now if out != fit.value_fit_now else threshold > fit.value_fit_now
    fit.direction = "rising" if rising else "falling"

    # already past: beyond an explicit limit, or crossed within the data
    side_now = fit.value_fit_now - threshold
    if limit == "upper":
        past = side_now >= 0
    elif limit == "lower":
        past = side_now <= 0
    else:
        past = (float(fitted[0]) - threshold) * side_now < 0

    # a straight air has no time constant of its own: the load's sets the search's horizon
    straight = isinstance(air_fit, FewAir) and air_fit.straight
    k_slow = k if straight else min(k, ka if ka > 0 else k)
    slow = 1.0 / max(k_slow, 1e-12)

    def eta_of(p: np.ndarray) -> float | None:
        return first_crossing(
            p[0], math.exp(p[1]), p[2], p[3], math.exp(p[4]), threshold, past, slow
        )

    p0 = np.array([fit.value_fit_now, math.log(k), air_now, out, math.log(max(ka, 1e-12))])
    fit.eta_s = eta_of(p0)
    if fit.eta_s == 0.0:
        fit.eta_lo_s = fit.eta_hi_s = 0.0
        return fit
    # 90 % interval: the 5th-95th percentiles of eta over parametric draws from both fits
    # (load: T_now and log k; air: Tout, amplitude, log ka), treated as independent.  The draws
    # use ``air_spread`` when given (a held air whose trend is not yet clear keeps its doubt).
    spread = air_spread if air_spread is not None else air_fit
    G = np.array([[P[0, pos][-1], dlogk[-1]], [0.0, 1.0]])  # (T0, log k) -> (T_now, log k)
    cov_now = G @ cov @ G.T
    if spread.cov is None or not np.all(np.isfinite(spread.cov)):
        fit.eta_lo_s, fit.eta_hi_s = (None, None) if fit.eta_s is None else (0.0, None)
        return fit
    rng = np.random.default_rng(DRAW_SEED)
    load = rng.multivariate_normal(
        [fit.value_fit_now, math.log(k)], cov_now, N_DRAWS, check_valid="ignore", method="eigh"
    )
    ka_s = spread.k_per_s
    airp = rng.multivariate_normal(
        [spread.ambient, spread.amplitude, math.log(max(ka_s, 1e-15))],
        spread.cov,
        N_DRAWS,
        check_valid="ignore",
        method="eigh",
    )
    a_out, a_amp, a_k = airp[:, 0], airp[:, 1], np.exp(airp[:, 2])
    a_now = a_out + a_amp * np.exp(-a_k * (t_now - spread.t_first))
    etas = crossings(
        load[:, 0], np.exp(load[:, 1]), a_now, a_out, a_k, threshold, past, horizon_s=60.0 * slow
    )
    etas = np.where(np.isnan(etas), np.inf, etas)
    lo_e, hi_e = np.percentile(etas, [5.0, 95.0])
    if air_spread is not None and fit.eta_s is not None:
        # the air's heading is not clear: holding it flat is the late extreme of what its fit
        # allows; when even the held air crosses, the point forecast is the median crossing over
        # the same draws as the interval (a held air that never crosses keeps "no crossing")
        fit.eta_s = float(min(fit.eta_s, np.median(etas)))
    if fit.eta_s is None:
        fit.eta_lo_s = float(lo_e) if math.isfinite(lo_e) else None
        fit.eta_hi_s = None
        return fit
    fit.eta_lo_s = float(min(lo_e, fit.eta_s))
    fit.eta_hi_s = None if not math.isfinite(hi_e) else float(max(hi_e, fit.eta_s))
    if straight:
        fit.eta_hi_s = None  # the air may level off at any time: nothing bounds the late end
    return fit


GAP_FACTOR = 3.0  # an air gap: a step between air readings over 3 x their median step


def gap_grid(s: np.ndarray, air_t: np.ndarray) -> np.ndarray:
    """The instants s plus instants inside each gap of the air readings (see air_input), at the
    air's median step, so the load's steps follow the air's curve across the gap."""
    if air_t.size < 3:
        return s
    steps = np.diff(air_t)
    typical = float(np.median(steps))
    extra = [
        np.arange(air_t[i] + typical, air_t[i + 1] - 0.5 * typical, typical)
        for i in np.flatnonzero(steps > GAP_FACTOR * typical)
    ]
    if not extra:
        return s
    fill = np.concatenate(extra)
    fill = fill[(fill > s[0]) & (fill < s[-1])]
    return np.unique(np.concatenate([s, fill]))


def air_input(s: np.ndarray, air_t: np.ndarray, air_y: np.ndarray, curve: LumpedFit) -> np.ndarray:
    """The air at the instants s: linear between air readings (held before the first), but
    across a gap in the air readings (a logger's dropout) the air's own fitted curve plus the
    residuals at the gap's two ends interpolated, so it meets the readings on both sides: a
    curving air is not a straight line over half an hour, and a load fitted against that line
    would take the misfit for its own k."""
    A = np.interp(s, air_t, air_y)
    if not curve.ok or air_t.size < 3 or not np.isfinite(curve.amplitude):
        return A
    steps = np.diff(air_t)
    i = np.clip(np.searchsorted(air_t, s, side="right") - 1, 0, steps.size - 1)
    gap = (s > air_t[0]) & (s < air_t[-1]) & (steps[i] > GAP_FACTOR * float(np.median(steps)))
    gap &= s >= curve.t_first
    if gap.any():
        resid = air_y - curve.curve(air_t)
        A = np.where(gap, curve.curve(s) + np.interp(s, air_t, resid), A)
    return A


def crossings(
    T_now: np.ndarray,
    k: np.ndarray,
    air_now: np.ndarray,
    out: np.ndarray,
    ka: np.ndarray,
    thr: float,
    past: bool,
    horizon_s: float,
) -> np.ndarray:
    """First crossing time per draw: a vectorised scan of T(x) on a log grid, then a few
    regula-falsi steps inside the bracket; inf where it never crosses within the horizon."""
    if past:
        return np.zeros(T_now.shape)
    # k == ka has its own closed form; nudging ka by 1e-6 of itself changes T(x) by less
    ka = np.where(np.abs(k - ka) < 1e-6 * k, ka * (1 + 1e-6), ka)
    A = k * (air_now - out) / (k - ka)

    def value(x: np.ndarray) -> np.ndarray:  # x broadcasts against (D, 1)
        with np.errstate(over="ignore", invalid="ignore"):
            return (
                out[:, None]
                + A[:, None] * np.exp(-ka[:, None] * x)
                + (T_now - out - A)[:, None] * np.exp(-k[:, None] * x)
                - thr
            )

    x = np.concatenate([[0.0], np.geomspace(1e-5 * horizon_s, horizon_s, 120)])[None, :]
    g = value(x)
    flip = np.sign(g[:, 1:]) != np.sign(g[:, :1])
    hit = flip.any(axis=1)
    i = np.argmax(flip, axis=1)
    rows = np.arange(g.shape[0])
    x0, x1, g0, g1 = x[0, i], x[0, i + 1], g[rows, i], g[rows, i + 1]
    for _ in range(4):
        with np.errstate(divide="ignore", invalid="ignore"):
            xc = x0 + (x1 - x0) * g0 / (g0 - g1)
        xc = np.nan_to_num(xc, nan=0.5 * (x0 + x1))
        gc = value(xc[:, None])[:, 0]
        left = np.sign(gc) == np.sign(g0)
        x0, g0 = np.where(left, xc, x0), np.where(left, gc, g0)
        x1, g1 = np.where(left, x1, xc), np.where(left, g1, gc)
    with np.errstate(divide="ignore", invalid="ignore"):
        xc = np.nan_to_num(x0 + (x1 - x0) * g0 / (g0 - g1), nan=0.5 * (x0 + x1))
    # a draw whose T_now is already on the far side of thr has crossed
    start_past = np.sign(g[:, 0]) != np.sign(thr_side(T_now, thr))
    return np.where(start_past, 0.0, np.where(hit, xc, np.inf))


def thr_side(T_now: np.ndarray, thr: float) -> np.ndarray:
    """The side of thr where most draws of T_now lie."""
    return np.full(T_now.shape, np.sign(np.median(T_now) - thr))


def measured_rss(
    t: np.ndarray,
    y: np.ndarray,
    air_t: np.ndarray,
    air_y: np.ndarray,
    *,
    exact: bool = False,
    n_grid: int = 24,
) -> float:
    """Minimum RSS of the measured-ambient model on readings (t, y): a k grid with a parabola
    in log k (quick), or that refined by a bounded 1-D search (exact).  For regime searches."""
    if t.size < 4 or t[-1] <= t[0]:
        return math.inf
    inside = (air_t >= t[0]) & (air_t <= t[-1])
    s = np.unique(np.concatenate([t, air_t[inside]]))
    A = np.interp(s, air_t, air_y)
    pos = np.searchsorted(s, t)

    def rss_k(k: np.ndarray) -> np.ndarray:
        P, G = response(k, s, A)
        P, G = P[:, pos], G[:, pos]
        r = y[None, :] - G
        T0 = (r * P).sum(1) / (P * P).sum(1)
        return ((r - T0[:, None] * P) ** 2).sum(1)

    lg = np.linspace(math.log(KD_MIN), math.log(KD_MAX), n_grid) - math.log(t[-1] - t[0])
    r = rss_k(np.exp(lg))
    i = int(np.argmin(r))
    if exact:
        res = minimize_scalar(
            lambda v: float(rss_k(np.array([math.exp(v)]))[0]),
            bounds=(lg[max(i - 1, 0)], lg[min(i + 1, n_grid - 1)]),
            method="bounded",
            options={"xatol": 1e-6},
        )
        return float(min(res.fun, r[i]))
    if 0 < i < n_grid - 1:
        den = r[i - 1] - 2 * r[i] + r[i + 1]
        if den > 0:
            return float(max(r[i] - 0.125 * (r[i - 1] - r[i + 1]) ** 2 / den, 0.0))
    return float(r[i])
