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
from thermeta.predictors.lumped import KD_MAX, KD_MIN, LumpedFit, fit_lumped

Z90 = 1.6448536269514722
N_DRAWS = 300
DRAW_SEED = 20_261_201  # fixed, so a forecast is a pure function of its readings
MIN_LOAD = 2  # T0 and k: two readings against the measured air determine them
MIN_MEASURED_SCATTER = 4  # below this the residuals cannot measure the scatter: it is assumed
MIN_AIR_CURVE = 5  # the air's own curve has three parameters; below this its straight trend
STRAIGHT_KD = 1e-6  # k * horizon of the air's straight trend written as a lumped curve


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
        return MeasuredFit(False, f"too few readings to fit ({n})", n=n)
    inside = (air_t >= t[0]) & (air_t <= t[-1])
    s = gap_grid(np.unique(np.concatenate([t, air_t[inside]])), air_t)
    A = air_input(s, air_t, air_y, air_spread if air_spread is not None else air_fit)
    beyond = s > air_t[-1]
    if beyond.any() and air_fit.ok:  # after the last one, the air's own curve
        A[beyond] = air_fit.curve(s[beyond])
    pos = np.searchsorted(s, t)
    D = float(t[-1] - t[0])
    if D <= 0:
        return MeasuredFit(False, "all readings at one instant", n=n)

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


def air_identified(fit: LumpedFit) -> bool:
    """Whether the air's own fit pins down where it is heading: its asymptote known to within
    +-50 % of the distance still to go, and its rate bounded away from 0."""
    if not fit.ok or fit.ambient_lo is None or fit.ambient_hi is None or not fit.k_lo:
        return False
    margin = 1e-6 * max(1.0, fit.bounds[1] - fit.bounds[0])
    if fit.ambient_lo <= fit.bounds[0] + margin or fit.ambient_hi >= fit.bounds[1] - margin:
        return False  # the range runs into the plausible bounds: not pinned down by the data
    return fit.ambient_hi - fit.ambient_lo <= abs(fit.ambient - fit.value_fit_now)


def held_air(fit: LumpedFit) -> LumpedFit:
    """The air held at its present fitted level (for the point forecast)."""
    held = LumpedFit(
        True,
        k_per_s=fit.k_per_s,
        ambient=fit.value_fit_now,
        value_fit_now=fit.value_fit_now,
        t_first=fit.t_first,
        t_last=fit.t_last,
        amplitude=0.0,
        sigma=fit.sigma,
        n=fit.n,
        ambient_lo=fit.ambient_lo,
        ambient_hi=fit.ambient_hi,
        k_lo=fit.k_lo,
        k_hi=fit.k_hi,
    )
    held.cov = fit.cov
    return held


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


class FewAir(LumpedFit):
    """The air's curve through four readings, one fewer than its full fit needs (few_air_curve),
    or with two or three its straight trend (straight_air, ``straight`` set): used as it is,
    never held at its present level."""


def straight_air(air_t: np.ndarray, air_y: np.ndarray, noise_sd: float) -> FewAir:
    """The air's straight trend A(d) = c + s d, written as a lumped curve that stays straight
    over any horizon that matters, Tout + b e^(-ka d) with ka d << 1, Tout = c + s / ka,
    b = -s / ka; the covariance of (Tout, b, log ka) maps that of (c, s) of the line, with the
    scatter taken as at least the assumed one (two readings cannot measure it).  A rising air
    held straight is the early extreme of where it may head: the crossing is early, not late."""
    d = air_t - air_t[0]
    D = max(float(d[-1]), 1.0)
    X = np.column_stack([np.ones_like(d), d])
    coef, *_ = np.linalg.lstsq(X, air_y, rcond=None)
    c, slope = float(coef[0]), float(coef[1])
    resid = air_y - X @ coef
    dof = air_y.size - 2
    s2 = float(resid @ resid) / dof if dof > 0 else 0.0
    sigma = math.sqrt(max(s2, assumed_scatter(air_y, noise_sd) ** 2))
    ka = STRAIGHT_KD / (1e4 * D)  # straight within 1e-6 over 10^4 spans
    fit = FewAir(
        True,
        k_per_s=ka,
        ambient=c + slope / ka,
        amplitude=-slope / ka,
        value_fit_now=c + slope * D,
        t_first=float(air_t[0]),
        t_last=float(air_t[-1]),
        sigma=sigma,
        n=int(air_y.size),
        residuals=resid,
        k_lo=ka,
        k_hi=ka,
        straight=True,
    )
    cov2 = np.linalg.pinv(X.T @ X) * sigma**2
    J = np.array([[1.0, 1.0 / ka], [0.0, -1.0 / ka], [0.0, 0.0]])
    fit.cov = J @ cov2 @ J.T
    return fit


def flat_air(air_t: np.ndarray, air_y: np.ndarray, noise_sd: float) -> bool:
    """Whether a few air readings hold still: their straight trend changes by less than twice
    the assumed scatter of one reading over their span."""
    slope = float(np.polyfit(air_t - air_t[0], air_y, 1)[0])
    return abs(slope) * float(air_t[-1] - air_t[0]) < 2.0 * assumed_scatter(air_y, noise_sd)


def k_band(k: float, sd_logk: float) -> tuple[float, float]:
    """k e^(-+Z90 sd) with sd the standard error of ln k; an unidentified rate (a flat series:
    sd without bound) gives (0, inf) instead of overflowing."""
    x = Z90 * sd_logk
    if not math.isfinite(x) or x > 700.0:
        return 0.0, math.inf
    return k * math.exp(-x), k * math.exp(x)


def few_air_curve(air_t: np.ndarray, air_y: np.ndarray, noise_sd: float) -> FewAir:
    """The air's lumped curve through four readings (one more than its parameters),
    A = a + b e^(-ka d), by variable projection on a grid of ka (then refined), with the scatter
    taken as at least the assumed one (four readings barely measure it) and the covariance of
    (Tout, b, log ka) from the Jacobian."""
    d = air_t - air_t[0]
    D = float(d[-1])
    spread = max(float(np.ptp(air_y)), 1e-6)
    bounds = (float(air_y.min()) - 10 * spread - 10.0, float(air_y.max()) + 10 * spread + 10.0)

    def solve(k: float) -> tuple[float, float, float]:
        X = np.column_stack([np.ones_like(d), np.exp(-k * d)])
        coef, *_ = np.linalg.lstsq(X, air_y, rcond=None)
        a = float(np.clip(coef[0], *bounds))
        e = X[:, 1]
        b = float((air_y - a) @ e / (e @ e))
        r = air_y - a - b * e
        return a, b, float(r @ r)

    lg = np.log(np.geomspace(KD_MIN, KD_MAX, 96) / D)
    rss = np.array([solve(math.exp(v))[2] for v in lg])
    i = int(np.argmin(rss))
    res = minimize_scalar(
        lambda v: solve(math.exp(v))[2],
        method="bounded",
        bounds=(lg[max(i - 1, 0)], lg[min(i + 1, lg.size - 1)]),
        options={"xatol": 1e-6},
    )
    k = math.exp(res.x) if res.fun <= rss[i] else math.exp(lg[i])
    a, b, r = solve(k)
    dof = air_y.size - 3
    sigma = math.sqrt(max(r / dof if dof > 0 else 0.0, assumed_scatter(air_y, noise_sd) ** 2))
    e = np.exp(-k * d)
    J = np.column_stack([np.ones_like(d), e, -b * k * d * e])
    cov = np.linalg.pinv(J.T @ J) * sigma**2
    sd_a, sd_lk = math.sqrt(max(cov[0, 0], 0.0)), math.sqrt(max(cov[2, 2], 0.0))
    fit = FewAir(
        True,
        k_per_s=k,
        ambient=a,
        amplitude=b,
        value_fit_now=a + b * float(e[-1]),
        t_first=float(air_t[0]),
        t_last=float(air_t[-1]),
        rss=r,
        dof=max(dof, 1),
        sigma=sigma,
        n=int(air_y.size),
        residuals=air_y - a - b * e,
        ambient_lo=a - Z90 * sd_a,
        ambient_hi=a + Z90 * sd_a,
        k_lo=k_band(k, sd_lk)[0],
        k_hi=k_band(k, sd_lk)[1],
        bounds=bounds,
    )
    fit.cov = cov
    return fit


def fit_air(air_t: np.ndarray, air_y: np.ndarray, noise_sd: float) -> LumpedFit:
    """The air's own lumped fit (ambient fitted), used to extrapolate it; with the covariance of
    (Tout, amplitude, log ka) from its Jacobian, cov = sigma^2 (J'J)^-1.  With fewer readings
    than that fit needs (after a logger's gap, say), few_air_curve or straight_air."""
    if 2 <= air_t.size < MIN_AIR_CURVE and air_t[-1] > air_t[0]:
        if air_t.size >= 3 and flat_air(air_t, air_y, noise_sd):
            # a held set point read a few times: a curve through it would bend on its noise
            return steady_air(air_t, air_y, air_t.size)
        if air_t.size >= MIN_AIR_CURVE - 1:
            # (three readings would fix three parameters exactly: their noise decides the bend)
            return few_air_curve(air_t, air_y, noise_sd)
        return straight_air(air_t, air_y, noise_sd)
    fit = fit_lumped(air_t, air_y, float(air_y[-1]), noise_sd=noise_sd)
    if fit.ok:
        d = air_t - air_t[0]
        e = np.exp(-fit.k_per_s * d)
        # T = a + b e^(-k d): dT/da = 1, dT/db = e, dT/dlog k = -b k d e
        J = np.column_stack([np.ones_like(d), e, -fit.amplitude * fit.k_per_s * d * e])
        fit.cov = np.linalg.pinv(J.T @ J) * fit.sigma**2
    return fit


def steady_air(air_t: np.ndarray, air_y: np.ndarray, n_runs: int) -> LumpedFit:
    """A held (cycling) air as a constant: its mean, with the doubt of a mean over the cycles
    seen (each half-cycle counted as one independent look)."""
    mean = float(np.mean(air_y))
    sd = float(np.std(air_y))
    se = sd / math.sqrt(max(n_runs / 2.0, 1.0))
    D = float(air_t[-1] - air_t[0]) if air_t.size > 1 else 1.0
    k = 1.0 / max(D, 1.0)
    fit = LumpedFit(
        True,
        k_per_s=k,
        ambient=mean,
        value_fit_now=mean,
        t_first=float(air_t[0]),
        t_last=float(air_t[-1]),
        amplitude=0.0,
        sigma=sd,
        n=int(air_y.size),
        ambient_lo=mean - Z90 * se,
        ambient_hi=mean + Z90 * se,
        k_lo=k,
        k_hi=k,
    )
    fit.cov = np.diag([se * se, 0.0, 0.0])
    return fit


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
