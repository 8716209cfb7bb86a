"""What the newest readings' own bend says about the crossing, whatever curve was fitted.

Two facts of any smooth approach that hold without knowing the model:

- A curve that decelerates toward the threshold (it bends away from its tangent: a body relaxing
  toward its ambient) crosses no earlier than its tangent does.  So a "never" from a level-off
  that the readings cannot test (fewer readings than the two-time-constant test needs, see
  predictors.combined_forecast.RICH_MIN) is not an answer they support: a slower second time
  constant, evaporation early on or a drifting room would carry the curve on.  It becomes a
  crossing with the fit's present value and slope and the most of its bend that still crosses
  (down to the tangent), the tangent's ETA as the early end and the late end open.
- A curve that accelerates toward the threshold (a probe that lags its product, a sensor with
  its own mass, a bath still warming the body) reaches it no later than its tangent does, as long
  as the acceleration lasts.  A decelerating answer (one exponential, which always decelerates)
  contradicts what the readings show: the point ETA is then the tangent's, the early end the
  crossing of the newest readings' parabola, and the late end stays the fitted curve's.

The bend is the quadratic term of a least-squares parabola through the newest half of the
readings (at least ``MIN_READINGS``), judged against its standard error (the scatter taken as at
least the readings' own floor, and widened by n / n_eff where its residuals are correlated) at
Student's one-sided ``CONF`` point (scipy.special.stdtrit).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy.special import stdtrit
from thermeta.predictors.combined_forecast import RICH_MIN, inflation
from thermeta.predictors.context import Context
from thermeta.predictors.lumped import LumpedFit, shrunk_eta
from thermeta.predictors.outcome import NoteCode
from thermeta.predictors.result import Forecast

NEWEST_SHARE = 0.5  # the parabola's readings: the newest half of the regime's span ...
MIN_READINGS = 5  # ... at least this many (three parameters, two to judge the scatter)
CONF = 0.99  # one-sided: the bend counts when beyond this Student's t point
LINE_CONF = 0.95  # the early end's steepest line: Student's one-sided point of its slope
BENDS = (1.0, 0.75, 0.5, 0.25, 0.0)  # shares of the fitted bend tried, most first
NEVER_CODES = (NoteCode.NEVER_LEVELS_OFF, NoteCode.EARLIEST_CROSSING)


@dataclass(frozen=True)
class Tangent:
    """The newest readings' parabola at the newest reading: value, slope (per s), curvature
    (second derivative, per s^2) and its t statistic."""

    value: float
    slope: float
    curvature: float
    t_stat: float
    dof: int

    def accelerates_toward(self, threshold: float) -> bool:
        """Whether the readings head for ``threshold`` and bend toward it, beyond doubt."""
        toward = self.slope * (threshold - self.value) > 0
        bends_on = self.curvature * self.slope > 0
        return toward and bends_on and abs(self.t_stat) > float(stdtrit(self.dof, CONF))

    def eta(self, threshold: float, limit: str | None = None) -> float | None:
        """Seconds until the tangent reaches ``threshold`` (None: it heads away)."""
        return shrunk_eta(self.value, self.slope, 0.0, threshold, limit)

    def parabola_eta(self, threshold: float) -> float | None:
        """Seconds until the parabola reaches ``threshold``: value + slope x + curvature x^2 / 2."""
        a, b, c = 0.5 * self.curvature, self.slope, self.value - threshold
        if a == 0:
            return None if b == 0 or -c / b <= 0 else -c / b
        disc = b * b - 4 * a * c
        if disc < 0:
            return None
        roots = [(-b + s * math.sqrt(disc)) / (2 * a) for s in (-1.0, 1.0)]
        ahead = [r for r in roots if r > 0]
        return min(ahead) if ahead else None


def newest_tangent(
    t: np.ndarray, y: np.ndarray, noise_sd: float = 0.0, quantum: float = 0.0
) -> Tangent | None:
    """The parabola through the newest half of the readings (None: too few readings)."""
    span = float(t[-1] - t[0])
    sel = t >= t[-1] - NEWEST_SHARE * span
    if sel.sum() < MIN_READINGS:
        sel = np.ones(t.size, bool)  # too few in the newest half: all of them
    x, v = t[sel] - t[-1], y[sel]
    if x.size < MIN_READINGS or x[0] >= 0:
        return None
    scale = -float(x[0])
    u = x / scale  # in (-1, 0]: a well-conditioned design
    design = np.column_stack([np.ones_like(u), u, u * u])
    coef, *_ = np.linalg.lstsq(design, v, rcond=None)
    resid = v - design @ coef
    dof = x.size - 3
    # correlated scatter (a fast logger) bends a parabola more than white scatter would
    s2 = max(float(resid @ resid) / dof, noise_sd**2, quantum**2 / 12.0) * inflation(resid)
    cov = s2 * np.linalg.inv(design.T @ design)
    se = math.sqrt(max(float(cov[2, 2]), 0.0))
    t_stat = float(coef[2]) / se if se > 0 else 0.0
    return Tangent(
        value=float(coef[0]),
        slope=float(coef[1]) / scale,
        curvature=2.0 * float(coef[2]) / scale**2,
        t_stat=t_stat,
        dof=dof,
    )


def newest_line_eta(
    t: np.ndarray,
    y: np.ndarray,
    threshold: float,
    limit: str | None,
    floor_sd: float = 0.0,
    conf: float | None = LINE_CONF,
) -> float | None:
    """Seconds until the straight line through the newest half of the readings reaches the
    threshold from the newest reading (None: it heads away); with ``conf``, the steepest line
    they allow (its slope toward the threshold at Student's one-sided ``conf`` point)."""
    sel = t >= t[-1] - NEWEST_SHARE * float(t[-1] - t[0])
    if sel.sum() < 4:
        sel = np.ones(t.size, bool)
    if sel.sum() < 3:
        return None
    x, v = t[sel] - t[-1], y[sel]
    slope, icpt = np.polyfit(x, v, 1)
    resid = v - (icpt + slope * x)
    dof = x.size - 2
    s2 = max(float(resid @ resid) / dof, floor_sd**2)
    se = math.sqrt(s2 / float(np.sum((x - x.mean()) ** 2)))
    steep = float(slope)
    if conf is not None:
        steep += math.copysign(float(stdtrit(dof, conf)) * se, threshold - icpt)
    return shrunk_eta(float(icpt), steep, 0.0, threshold, limit)


def bend_that_crosses(
    now: float, slope: float, k: float, threshold: float, limit: str | None
) -> float | None:
    """The ETA of the curve through ``now`` with ``slope`` keeping the most of its rate ``k``
    (a share of BENDS) that still reaches the threshold; None when not even its tangent does."""
    for share in BENDS:
        eta = shrunk_eta(now, slope, share * k, threshold, limit)
        if eta is not None:
            return eta
    return None


def open_untested_never(fc: Forecast, ctx: Context, fit: LumpedFit, n: int) -> bool:
    """A lumped "never" from a level-off on fewer readings than the shape test needs becomes a
    crossing with an open late end (module docstring); not when a given ambient short of the
    threshold is what says "never", nor when the readings move away.  Whether it did."""
    if fc.eta_s is not None or not fit.ok or n >= RICH_MIN:
        return False
    now, thr = float(fit.value_fit_now), ctx.threshold
    if ctx.ambient is not None and (ctx.ambient - thr) * (thr - now) <= 0:
        return False  # the user's own ambient stops short of the threshold
    slope = -fit.k_per_s * fit.amplitude * math.exp(-fit.k_per_s * (fit.t_last - fit.t_first))
    tangent = shrunk_eta(now, slope, 0.0, thr, ctx.limit)
    eta = bend_that_crosses(now, slope, fit.k_per_s, thr, ctx.limit)
    if tangent is None or eta is None:
        return False
    # the fit that levels off flattens its own slope: the steepest line the newest readings allow
    line = newest_line_eta(
        ctx.t, ctx.y, thr, ctx.limit, math.hypot(ctx.noise_sd, ctx.quantum / 12**0.5)
    )
    tangent = min(tangent, line) if line is not None else tangent
    fc.notes = [n for n in fc.notes if n.code not in NEVER_CODES]
    fc.params.pop("eta_earliest_s", None)
    fc.eta_s, fc.eta_lo_s, fc.eta_hi_s = eta, tangent, None
    if "amplitude" in fc.params:
        k_ahead = _share_kept(now, slope, fit.k_per_s, thr, ctx.limit) * fit.k_per_s
        fc.params.update(k_ahead_per_s=k_ahead, ahead_from_t=fit.t_last)
    fc.note(
        NoteCode.NEVER_UNTESTED,
        f"the fitted curve levels off short of the threshold, but {n} readings cannot "
        "tell one time constant from two: the ETA keeps the most of the fitted bend that still "
        "crosses, the early end is the present slope's straight line and the late end is open",
    )
    return True


def _share_kept(now: float, slope: float, k: float, thr: float, limit: str | None) -> float:
    for share in BENDS:
        if shrunk_eta(now, slope, share * k, thr, limit) is not None:
            return share
    return 0.0


def hold_acceleration(fc: Forecast, ctx: Context) -> bool:
    """Readings that accelerate toward the threshold get no later point ETA than their tangent's
    (module docstring).  Whether the forecast changed."""
    if fc.eta_s == 0.0:
        return False
    tan = newest_tangent(ctx.t, ctx.y, ctx.noise_sd, ctx.quantum)
    if tan is None or not tan.accelerates_toward(ctx.threshold):
        return False
    eta = tan.eta(ctx.threshold, ctx.limit)
    if eta is None or (fc.eta_s is not None and fc.eta_s <= eta):
        return False
    early = tan.parabola_eta(ctx.threshold)
    late = fc.eta_hi_s if fc.eta_s is not None else None
    fc.notes = [n for n in fc.notes if n.code not in NEVER_CODES]
    fc.params.pop("eta_earliest_s", None)
    fc.eta_s = eta
    fc.eta_lo_s = min(eta, early if early is not None else eta, fc.eta_lo_s or math.inf)
    fc.eta_hi_s = None if late is None else max(late, eta)
    fc.direction = "rising" if tan.slope > 0 else "falling"
    if "amplitude" in fc.params:
        fc.params.update(
            k_ahead_per_s=0.0,
            ahead_from_t=float(ctx.t[-1]),
            ahead_value=tan.value,
            ahead_slope_per_s=tan.slope,
        )
    fc.note(
        NoteCode.ACCELERATING,
        "the newest readings bend toward the threshold (they speed up), which one exponential "
        "cannot do: the ETA follows their present slope in a straight line, the early end their "
        "bend kept up, the late end the fitted curve's",
    )
    return True


def widen_untested_early_end(fc: Forecast, ctx: Context, n: int) -> bool:
    """With fewer readings than the shape test needs, one exponential is assumed, not tested: the
    interval's early end is then no later than the steepest straight line the newest readings
    allow (a curve that slows down crosses after its tangent, whatever its time constants).
    Whether it moved."""
    if n >= RICH_MIN or not fc.eta_s or fc.eta_lo_s is None or not math.isfinite(fc.eta_lo_s):
        return False
    floor = math.hypot(ctx.noise_sd, ctx.quantum / math.sqrt(12.0))
    line = newest_line_eta(ctx.t, ctx.y, ctx.threshold, ctx.limit, floor)
    if line is None or line >= fc.eta_lo_s:
        return False
    fc.eta_lo_s = line
    return True


def note_slowing(fc: Forecast, ctx: Context) -> None:
    """Curves that level off short of the threshold were overruled because the readings' rate
    falls beyond one exponential (predictors.combine.slowing): say so, and keep the early end no
    later than the steepest line the newest readings allow (the curve slows down, so it crosses
    after its tangent)."""
    floor = math.hypot(ctx.noise_sd, ctx.quantum / math.sqrt(12.0))
    line = newest_line_eta(ctx.t, ctx.y, ctx.threshold, ctx.limit, floor)
    if fc.eta_s and line is not None and (fc.eta_lo_s is None or line < fc.eta_lo_s):
        fc.eta_lo_s = line
    fc.note(
        NoteCode.SLOWING,
        "some curves level off short of the threshold, but the readings' rate falls faster than "
        "one time constant allows (a second, slower one): their level-off is only a lower bound "
        "on the change to come, so the forecast keeps the crossing, with an open late end",
    )
