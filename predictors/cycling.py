"""A thermostat's sawtooth: no exponential curve through it, but the drift of its cycle means.

A healthy cold room's probe swings between the thermostat's cut-in and cut-out (compressor on,
off).  A lumped curve fitted across a few of those swings extrapolates whatever slope the window's
ends happen to show, and so forecasts crossings that never come.  What the readings do tell is the
mean of each full cycle and the swing around it.  A crossing is forecast only when the cycle means
drift toward the threshold significantly (a unit losing ground); then the upper (or lower) edge
of the swing reaches it at

    eta = (thr - edge_now) / drift,        edge_now = mean_now + half swing (toward thr),

with the 90 % interval from the drift's t interval.  The drift must be clear (a one-sided t test
at 99.5 %: a healthy room is tested every few minutes, month after month) and the crossing within
HORIZON_SPANS times the span of readings it was seen over (a drift of a few tenths of a degree over
two hours says nothing about tomorrow).  Otherwise: no crossing while the cycling holds (the
regime search reports when it stops).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from itertools import pairwise

import numpy as np
from thermeta.predictors.context import Context
from thermeta.predictors.outcome import NoteCode
from thermeta.predictors.quantiles import t_ppf
from thermeta.predictors.regime import slope_runs
from thermeta.predictors.result import Forecast
from thermeta.predictors.wording import point, step

CONF = 0.90
DRIFT_CONF = 0.995  # one-sided: evidence of a drift, strict against a healthy room's false alerts
HORIZON_SPANS = 2.0  # a drift is extrapolated at most twice as far as the readings reach back
MIN_CYCLES = 3  # a drift needs at least three cycle means (one degree of freedom)


@dataclass
class CycleTrend:
    """Cycle means and their drift; eta from the newest reading (None: no crossing forecast)."""

    n_cycles: int
    mean_now: float
    half_swing: float
    drift_per_s: float
    drift_se: float
    significant: bool
    beyond_horizon: bool = False
    eta_s: float | None = None
    eta_lo_s: float | None = None
    eta_hi_s: float | None = None


def cycle_means(
    t: np.ndarray, y: np.ndarray, noise_sd: float
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(mid time, time-weighted mean, peak-to-peak) of each full cycle: from one rising run's start
    to the next (the trapezoid rule, so irregular sampling weighs by time, not by count)."""
    runs = slope_runs(t, y, max(noise_sd, 1e-6))
    starts = [r[0] for r in runs if r[2] > 0]
    mids, means, swings = [], [], []
    for i0, i1 in pairwise(starts):
        tt, yy = t[i0 : i1 + 1], y[i0 : i1 + 1]
        span = tt[-1] - tt[0]
        if span <= 0 or tt.size < 3:
            continue
        mids.append(0.5 * (tt[0] + tt[-1]))
        means.append(float(np.sum(0.5 * (yy[1:] + yy[:-1]) * np.diff(tt)) / span))
        swings.append(float(np.ptp(yy)))
    return np.array(mids), np.array(means), np.array(swings)


def cycle_trend(
    t: np.ndarray, y: np.ndarray, thr: float, noise_sd: float, limit: str | None = None
) -> CycleTrend:
    """Drift of the cycle means (a straight line through them, its slope's one-sided t test at
    90 %) and, when it carries the swing's edge toward thr, the crossing time and its interval."""
    mids, means, swings = cycle_means(t, y, noise_sd)
    half = 0.5 * float(np.median(swings)) if swings.size else 0.5 * float(np.ptp(y))
    if means.size < MIN_CYCLES:
        return CycleTrend(int(means.size), float(np.mean(y)), half, 0.0, math.inf, False)
    slope, icpt = np.polyfit(mids - mids[-1], means, 1)
    resid = means - (icpt + slope * (mids - mids[-1]))
    dof = means.size - 2
    sxx = float(np.sum((mids - mids.mean()) ** 2))
    # the scatter of the cycle means, floored by what the reading noise alone leaves in a mean
    s2 = max(float(resid @ resid) / dof, noise_sd**2 / max(t.size / means.size, 1.0))
    se = math.sqrt(s2 / sxx) if sxx > 0 else math.inf
    mean_now = float(icpt + slope * (t[-1] - mids[-1]))
    out = CycleTrend(int(means.size), mean_now, half, float(slope), se, False)
    toward = 1.0 if (thr > mean_now if limit is None else limit == "upper") else -1.0
    if toward * slope <= float(t_ppf(DRIFT_CONF, dof)) * se:
        return out  # no drift toward the threshold that the cycle means can tell from zero
    out.significant = True
    edge = mean_now + toward * half
    gap = thr - edge
    if gap * toward <= 0:
        out.eta_s = out.eta_lo_s = out.eta_hi_s = 0.0  # the swing already reaches the threshold
        return out
    eta = gap / slope  # edge_now + drift eta = thr
    if eta > HORIZON_SPANS * float(t[-1] - t[0]):
        out.beyond_horizon = True
        return out
    out.eta_s = eta
    q = float(t_ppf(CONF, dof))
    fast, slow = toward * slope + q * se, toward * slope - q * se
    out.eta_lo_s = abs(gap) / fast
    out.eta_hi_s = abs(gap) / slow if slow > 0 else None
    return out


def cycling_forecast(ctx: Context, fc: Forecast) -> Forecast:
    """The readings cycle: forecast from the drift of the cycle means (see the module
    docstring)."""
    tt, yy = ctx.t, ctx.y
    tr = cycle_trend(tt, yy, ctx.threshold, ctx.noise_sd, ctx.limit)
    fc.pattern = "cycling"
    fc.eta_s, fc.eta_lo_s, fc.eta_hi_s = tr.eta_s, tr.eta_lo_s, tr.eta_hi_s
    fc.direction = "rising" if tr.drift_per_s > 0 else "falling"
    fc.interval_method = "t interval of the drift of the cycle means"
    fc.model_weights = {"cycle_means": 1.0}
    fc.params = {
        "n_cycles": float(tr.n_cycles),
        "cycle_mean": tr.mean_now,
        "half_swing": tr.half_swing,
        "drift_per_s": tr.drift_per_s,
        "drift_se_per_s": tr.drift_se,
        "n_fit": float(tt.size),
    }
    # the centre is said only where the readings are: with fewer than MIN_CYCLES cycles it is
    # the window's mean, and a drifted line of means can end away from the newest readings
    # (a chill stopped at 18 degC once read "cycle around 29.7")
    newest = float(np.median(yy[-3:]))
    at_centre = abs(newest - tr.mean_now) <= tr.half_swing + 3.0 * ctx.noise_sd
    if tr.n_cycles < MIN_CYCLES:
        text = (
            f"the readings swing like a thermostat's, but show {tr.n_cycles} full cycle(s), "
            f"fewer than the {MIN_CYCLES} a drift needs; no crossing is forecast from them"
        )
        fc.note(NoteCode.CYCLING, text)
        return fc
    text = (
        f"the readings cycle (a thermostat?) around {point(tr.mean_now, '.3g')} +- "
        if at_centre
        else "the readings cycle (a thermostat?) by +- "
    ) + f"{step(tr.half_swing, '.2g')} over {tr.n_cycles} full cycles"
    if tr.beyond_horizon:
        text += (
            f"; their mean drifts by {step(tr.drift_per_s * 3600, '+.2g')} "
            "per hour toward the threshold, too slowly to forecast a crossing "
            "from these readings (it would lie beyond twice their span)"
        )
    elif tr.significant:
        text += (
            f"; their mean drifts by {step(tr.drift_per_s * 3600, '+.2g')} "
            "per hour, so the swing's edge is extrapolated to the threshold"
        )
    else:
        text += (
            "; no drift toward the threshold that the cycles can tell "
            "from zero, so no crossing is forecast while they hold"
        )
    fc.note(NoteCode.CYCLING, text)
    return fc
