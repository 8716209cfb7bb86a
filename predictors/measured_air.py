"""The measured ambient's own curve: where the air probe is heading, for the load to follow.

The air is fitted by its own lumped curve (ambient fitted), A(t) = Tout + b e^(-ka (t - t0)),
with the covariance of (Tout, b, log ka) for the load's interval draws.  With fewer readings
than that fit needs, four readings give the curve with an assumed scatter (few_air_curve), two
or three the straight trend (straight_air); a held set point read a few times, or a thermostat's
cycling air, is carried forward at its mean (steady_air); an air whose heading is not clear yet
is held at its present level for the point forecast (held_air).
"""

from __future__ import annotations

import math

import numpy as np
from scipy.optimize import minimize_scalar
from thermeta.predictors.few import assumed_scatter
from thermeta.predictors.lumped import KD_MAX, KD_MIN, LumpedFit, fit_lumped

Z90 = 1.6448536269514722
MIN_AIR_CURVE = 5  # the air's own curve has three parameters; below this its straight trend
STRAIGHT_KD = 1e-6  # k * horizon of the air's straight trend written as a lumped curve


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
