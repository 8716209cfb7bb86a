"""Forecasts from fewer readings than a curve fit needs (two or three, say, after a logger's gaps).

With the ambient given (or measured), two readings determine the lumped curve: T0 and k, the
two-reading solve

    k = ln((Ta - T1) / (Ta - T2)) / (t2 - t1),

and with more readings, the least-squares line through u_i = ln|Ta - T_i| = c - k (t_i - t_1).
With the ambient fitted, two readings give a straight trend only (see forecast._few_trend).

The readings' scatter cannot be measured from two readings (and barely from three), so the
interval takes it from what is known beforehand: a stated floor for a probe's short-term scatter
(``PROBE_SCATTER_SD``), the quantisation step (uniform, sd q / sqrt(12)), and the given ambient's
uncertainty (1 sd).  The 90 % interval is the 5th-95th percentiles of the crossing time over
seeded parametric draws of the readings and the ambient; a draw that never crosses (the curve
levels off short of the threshold, or the readings move away from it) is an open late end.  The
early end is a real bound (it is what the alert rules' 'approaching' reads), never a bare 0.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from thermeta.predictors.context import Context
from thermeta.predictors.lumped import crossing_eta
from thermeta.predictors.outcome import NoteCode
from thermeta.predictors.quantiles import t_ppf
from thermeta.predictors.result import Forecast, never_reason
from thermeta.predictors.wording import step

Z90 = 1.6448536269514722  # the standard normal's 95th percentile (two-sided 90 %)

# A food or air probe's short-term scatter (common practice: thermistor and RTD loggers read to
# 0.1 degC and wander by about 0.1-0.2 between readings): the middle of that range, 1 sd, in
# degC, is taken where the readings cannot measure their own scatter.  (The predictors do not
# know the unit: for readings in degF this floor is about half a probe's scatter.)
PROBE_SCATTER_SD = 0.15
N_DRAWS = 2000
DRAW_SEED = 20_261_202  # fixed, so a forecast is a pure function of its readings
GRIDS = (1.0, 0.5, 0.1, 0.01)  # reading steps looked for in a handful of readings


def few_quantum(y: np.ndarray) -> float:
    """The coarsest step of GRIDS that every reading sits on (0 if none): with two readings a
    finer grid may look coarser by chance, which only widens the interval."""
    for q in GRIDS:
        if np.all(np.abs(y / q - np.round(y / q)) < 1e-6):
            return q
    return 0.0


def assumed_scatter(y: np.ndarray, noise_sd: float = 0.0, quantum: float = 0.0) -> float:
    """The sd taken for each reading when the readings cannot measure it:
    sqrt(max(floor, noise_sd)^2 + q^2 / 12)."""
    q = max(quantum, few_quantum(np.asarray(y, float)))
    return math.sqrt(max(PROBE_SCATTER_SD, noise_sd) ** 2 + q * q / 12.0)


@dataclass
class FewFit:
    """The lumped curve through a few readings with the ambient given."""

    ok: bool
    reason: str | None = None
    k_per_s: float = math.nan
    value_fit_now: float = math.nan
    value_start: float = math.nan
    sigma: float = math.nan
    eta_s: float | None = None
    eta_lo_s: float | None = None
    eta_hi_s: float | None = None
    k_lo: float | None = None
    k_hi: float | None = None
    direction: str | None = None


def log_line(d: np.ndarray, y: np.ndarray, ambient: np.ndarray):
    """Per row of y (draws) with its ambient: k, u_now = ln|Ta - T| at the last reading, and the
    side sgn = sign(Ta - T): the least-squares line u = c - k d through u_i = ln(sgn (Ta - T_i));
    NaN where a reading is on the ambient's other side.  Two readings: the two-reading solve
    k = ln((Ta - T1) / (Ta - T2)) / (t2 - t1) exactly."""
    gap = ambient[:, None] - y
    sgn = np.sign(gap[:, -1])
    with np.errstate(divide="ignore", invalid="ignore"):
        u = np.where(gap * sgn[:, None] > 0, np.log(np.abs(gap)), np.nan)
    dc = d - d.mean()
    slope = (u - u.mean(axis=1, keepdims=True)) @ dc / float(dc @ dc)
    u_now = u.mean(axis=1) + slope * dc[-1]
    return -slope, u_now, sgn


def known_few(
    t: np.ndarray,
    y: np.ndarray,
    thr: float,
    ambient: float,
    ambient_sd: float,
    sigma: float,
    limit: str | None = None,
) -> FewFit:
    """The lumped curve through two or more readings toward a given ambient, with a 90 %
    interval over draws of the readings (sd ``sigma`` each) and the ambient (sd ``ambient_sd``)."""
    d = np.asarray(t, float) - float(t[0])
    y = np.asarray(y, float)
    if y.size < 2 or d[-1] <= 0:
        return FewFit(False, f"too few readings to fit ({y.size})")
    k_arr, u_arr, _ = log_line(d, y[None, :], np.array([ambient]))
    k, u_now = float(k_arr[0]), float(u_arr[0])
    if not (math.isfinite(k) and math.isfinite(u_now)):
        return FewFit(False, "the readings lie on both sides of the given ambient")
    sgn = 1.0 if ambient > y[-1] else -1.0
    now = ambient - sgn * math.exp(u_now)
    start = ambient - sgn * math.exp(u_now + k * d[-1])
    fit = FewFit(True, k_per_s=k, value_fit_now=now, value_start=start, sigma=sigma)
    fit.eta_s, fit.direction = crossing_eta(now, ambient, k, thr, value_start=start, limit=limit)
    if k <= 0:
        fit.eta_s = None if fit.eta_s != 0.0 else 0.0
    if fit.eta_s == 0.0:
        fit.eta_lo_s = fit.eta_hi_s = 0.0
        return fit
    rng = np.random.default_rng(DRAW_SEED)
    amb = ambient + ambient_sd * rng.standard_normal(N_DRAWS)
    yd = y[None, :] + sigma * rng.standard_normal((N_DRAWS, y.size))
    kd, ud, sd = log_line(d, yd, amb)
    etas = draw_etas(kd, ud, sd, amb, thr, limit)
    lo, hi = np.percentile(etas, [5.0, 95.0])
    good = kd[np.isfinite(kd)]
    if good.size:
        k_lo, k_hi = np.percentile(good, [5.0, 95.0])
        fit.k_lo, fit.k_hi = float(max(k_lo, 0.0)), float(k_hi)
    fit.eta_lo_s = float(lo) if math.isfinite(lo) else None
    fit.eta_hi_s = float(hi) if math.isfinite(hi) else None
    if fit.eta_s is not None:
        if fit.eta_lo_s is not None:
            fit.eta_lo_s = min(fit.eta_lo_s, fit.eta_s)
        if fit.eta_hi_s is not None:
            fit.eta_hi_s = max(fit.eta_hi_s, fit.eta_s)
    return fit


def draw_etas(
    k: np.ndarray,
    u_now: np.ndarray,
    sgn: np.ndarray,
    ambient: np.ndarray,
    thr: float,
    limit: str | None,
) -> np.ndarray:
    """Crossing time per draw, eta = ln((Ta - T_now) / (Ta - thr)) / k with T_now = Ta - sgn
    e^u_now; 0 where the draw is already beyond the limit, inf where it never crosses (k <= 0,
    the asymptote short of the threshold, the wrong direction for the limit, or a reading
    beyond the ambient)."""
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        value_now = ambient - sgn * np.exp(u_now)
        heads = (ambient - thr) * (value_now - thr) < 0  # thr lies between T_now and Ta
        if limit == "upper":
            heads &= sgn > 0
        elif limit == "lower":
            heads &= sgn < 0
        eta = np.where(heads & (k > 0), np.log((ambient - value_now) / (ambient - thr)) / k, np.inf)
    if limit == "upper":
        eta = np.where(value_now >= thr, 0.0, eta)
    elif limit == "lower":
        eta = np.where(value_now <= thr, 0.0, eta)
    return np.where(np.isnan(eta), np.inf, eta)


def few_forecast(ctx: Context, fc: Forecast) -> Forecast:
    """Fewer readings than a curve fit needs: with the ambient given, the lumped curve through
    them (two readings determine T0 and k); with it fitted, the straight trend."""
    tt, yy, thr, limit = ctx.t, ctx.y, ctx.threshold, ctx.limit
    sigma = assumed_scatter(yy, ctx.noise_sd, ctx.quantum)
    ambient, amb_sd = ctx.ambient, ctx.ambient_sd
    if ambient is None:
        return few_trend(fc, tt, yy, thr, limit, sigma)
    fit = known_few(tt, yy, thr, float(ambient), amb_sd, sigma, limit)
    if not fit.ok:
        return few_trend(fc, tt, yy, thr, limit, sigma)
    fc.model, fc.lag_factor_j = "lumped", 1.0
    fc.model_weights = {"lumped": 1.0}
    fc.ambient_given = float(ambient)
    fc.k_per_s, fc.k_lo_per_s, fc.k_hi_per_s = fit.k_per_s, fit.k_lo, fit.k_hi
    fc.ambient = float(ambient)
    fc.ambient_lo, fc.ambient_hi = ambient - Z90 * amb_sd, ambient + Z90 * amb_sd
    fc.eta_s, fc.eta_lo_s, fc.eta_hi_s = fit.eta_s, fit.eta_lo_s, fit.eta_hi_s
    fc.direction, fc.rmse = fit.direction, sigma
    fc.interval_method = (
        "parametric draws over the assumed reading scatter and the given ambient's uncertainty"
    )
    fc.params = {
        "t_first": float(tt[0]),
        "amplitude": fit.value_start - float(ambient),
        "ambient": float(ambient),
        "k_per_s": fit.k_per_s,
        "value_fit_now": fit.value_fit_now,
        "n_fit": float(tt.size),
        "n_params": 2.0,
    }
    fc.note(
        NoteCode.FEW_READINGS,
        f"only {tt.size} readings: the curve toward the given ambient through them, with their "
        f"scatter taken as {step(sigma, '.2g')} (1 sd, not measured) and the ambient as uncertain "
        f"by {step(amb_sd)}; the interval is wide for that",
    )
    if fc.eta_s is None:
        fc.note(*never_reason(fc))
    return fc


def few_trend(fc: Forecast, tt, yy, thr: float, limit, sigma: float) -> Forecast:
    """Too few readings for a curve with the ambient fitted: the straight trend through them,
    T(x) = T_now + s x, with the slope's one-sided 95 % bound as the early end and an open late
    end (the curve may level off; nothing here says where).  The scatter is at least ``sigma``
    (the assumed scatter of :func:`assumed_scatter`), which a line through two or three readings
    cannot measure; with two readings it is all there is (a normal bound), with more a t bound
    on the larger of it and the residuals' scatter."""
    d = tt - tt[0]
    slope, icpt = np.polyfit(d, yy, 1)
    dof = tt.size - 2
    resid = yy - (icpt + slope * d)
    s2 = max(float(resid @ resid) / dof, sigma**2) if dof > 0 else sigma**2
    sxx = float(np.sum((d - d.mean()) ** 2))
    se = math.sqrt(s2 / sxx) if sxx > 0 else math.inf
    now = float(icpt + slope * d[-1])
    fc.model, fc.interval_method = "lumped", "one-sided bound of a straight trend's slope"
    fc.model_weights = {"trend": 1.0}
    fc.direction = "rising" if slope > 0 else "falling"
    fc.rmse = math.sqrt(s2)
    fc.params = {
        "slope_per_s": float(slope),
        "slope_se_per_s": se,
        "value_fit_now": now,
        "n_fit": float(tt.size),
        "n_params": 2.0,
    }
    fc.note(
        NoteCode.FEW_READINGS,
        f"only {tt.size} readings: a straight trend, not a curve, and the "
        "interval's late end is open (the curve may level off)",
    )
    toward = 1.0 if (thr > now if limit is None else limit == "upper") else -1.0
    if (thr - now) * toward <= 0:
        fc.eta_s = fc.eta_lo_s = fc.eta_hi_s = 0.0
        return fc
    if slope * toward <= 0:
        fc.note(*never_reason(fc))
        return fc
    q95 = float(t_ppf(0.95, dof)) if dof > 0 else Z90
    fast = slope * toward + q95 * se
    fc.eta_s = (thr - now) / slope  # T_now + s eta = thr
    fc.eta_lo_s, fc.eta_hi_s = abs(thr - now) / fast, None
    return fc
