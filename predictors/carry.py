"""A change of the surroundings that came back (a door opened and shut): carry k across it.

A door opened and closed again changes neither the load's k nor, once shut, the ambient:
Newton's law is memoryless, so the load goes on along the same k and ambient from a new start.
The readings before the door then hold most of what is known of k, and with k known the newest
regime is located to a reading or two (regime.split_disturbance) instead of to the dozen
readings the blind search needs.  A real change of the surroundings (chiller water switched, a
new set point) shows as a newest fit whose k or fitted ambient lies beyond CARRY_Z combined sd of
the older one, as too few readings after the located start to fit at all, or as older readings
that did not follow a given ambient: then the newest readings stand alone, as found by the blind
search.  Only k is carried: the older fit's ambient is correlated with its k, and the two carried
as independent priors made intervals too narrow in trials.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from thermeta.predictors.context import Before
from thermeta.predictors.lumped import LumpedFit, fit_lumped
from thermeta.predictors.outcome import NoteCode
from thermeta.predictors.regime import (
    MIN_REGIME_POINTS,
    find_door,
    lag_inflation,
    smooth_rss,
    split_disturbance,
)
from thermeta.predictors.result import Forecast
from thermeta.predictors.shared import shared

Z90 = 1.6449  # the two-sided 90 % point of the normal: a 90 % interval spans 2 Z90 sd
CARRY_Z = 3.0  # |z| beyond this: the newest readings contradict the older regime's value


@dataclass
class Carried:
    """The newest regime's fit with k carried from before the change, and its readings."""

    kw: dict
    fit: LumpedFit
    t: np.ndarray
    y: np.ndarray


@shared
def short_door(
    tt: np.ndarray, yy: np.ndarray, min_points: int, margin: int = 2, inflation: float = 1.0
) -> int:
    """End of the readings before a short disturbance (regime.find_door) that the regime search
    cannot see, or 0.  The door is first placed with the whole window's k and ambient, which it
    biases, then again with those of the readings before it."""
    whole = fit_lumped(tt, yy, float(yy[-1]), intervals=False)
    if not whole.ok:
        return 0
    door = find_door(
        tt, yy, whole.k_per_s, whole.ambient, whole.rss, min_side=min_points, inflation=inflation
    )
    if not door.found:
        return 0
    pre = fit_lumped(tt[: door.c1], yy[: door.c1], float(yy[-1]), intervals=False)
    if pre.ok:
        again = find_door(
            tt, yy, pre.k_per_s, pre.ambient, whole.rss, min_side=min_points, inflation=inflation
        )
        if again.found:
            door = again
    # a smooth curve with two time constants (three parameters fewer than the door) may explain
    # the readings as well: a second time constant is not a door
    gain = (smooth_rss(tt, yy) - door.rss) / door.scale
    if gain < 3 * math.log(tt.size) + 12.0:
        return 0
    end = door.c1 - margin
    return end if end >= min_points else 0


def log_sd(lo: float | None, hi: float | None, est: float) -> float | None:
    """The sd of ln(value) from a 90 % interval; None when an end is open."""
    if lo is None or hi is None or not lo > 0 or not hi > lo or not est > 0:
        return None
    return (math.log(hi) - math.log(lo)) / (2 * Z90)


def lin_sd(fit: LumpedFit) -> float | None:
    """The sd of the fitted ambient from its 90 % interval; None when it reaches the bounds."""
    lo, hi = fit.ambient_lo, fit.ambient_hi
    if lo is None or hi is None or not hi > lo:
        return None
    if lo <= fit.bounds[0] + 1e-9 or hi >= fit.bounds[1] - 1e-9:
        return None
    return (hi - lo) / (2 * Z90)


def agrees(a: float, sd_a: float | None, b: float, sd_b: float | None) -> bool:
    """|a - b| <= CARRY_Z combined sd; a missing sd of the newest fit means it cannot tell."""
    if sd_b is None:
        return True
    return abs(a - b) <= CARRY_Z * math.hypot(sd_a or 0.0, sd_b)


def older_fit(t_all, y_all, end: int, thr: float, kw: dict, margin: int = 2):
    """The fit of the readings before a disturbance, and where the newest regime starts.

    The searches place the disturbance's start only roughly (often a few readings late, and
    a few of its readings bias the older fit), so it is placed again with the older curve itself
    (regime.split_disturbance, searching from a third of the way back), and the older readings
    end ``margin`` readings before it.
    """
    floor = MIN_REGIME_POINTS
    old = fit_lumped(t_all[:end], y_all[:end], thr, **kw)
    j = end
    for _ in range(2):
        if not old.ok:
            break
        i0 = max(floor, end - end // 3)
        c1, j = split_disturbance(t_all, y_all, old.curve, old.k_per_s, old.ambient, i0)
        if c1 - margin >= end or c1 - margin < floor:
            break
        end = c1 - margin
        old = fit_lumped(t_all[:end], y_all[:end], thr, **kw)
    return old, max(j, end)


def carry_before(
    fc: Forecast, fit: LumpedFit, kw: dict, before: Before, thr: float
) -> Carried | None:
    """Carry k from the readings before a change into the newest regime's fit, as a Gaussian
    prior on ln k, when the two agree (see the module docstring).  Returns the keyword
    arguments, the fit and the readings to go on with, or None (the newest regime's own fit
    stands)."""
    t_all, y_all = before.t, before.y
    old, j = older_fit(t_all, y_all, before.end, thr, kw)
    sd_k = log_sd(old.k_lo, old.k_hi, old.k_per_s) if old.ok else None
    if sd_k is None or not fit.ok:
        return None
    t_new, y_new = t_all[j:], y_all[j:]
    # the default plausible range of the ambient scales with the readings' spread, which a few
    # readings after the change understate: take the older readings' range
    new_kw = dict(kw, bounds=kw.get("bounds") or old.bounds)
    alone = fit_lumped(t_new, y_new, thr, **new_kw)
    toward = kw["ambient"] if kw.get("ambient") is not None else old.ambient
    if moves_away(t_new, y_new, toward) or not carry_agrees(old, sd_k, alone, kw):
        if before.cut:
            fc.note(
                NoteCode.REGIME_BEFORE_DIFFERS,
                "the readings before the change follow another curve (k or "
                "ambient differ); they are not used",
            )
        return None
    new_kw["k_prior"] = (math.log(old.k_per_s), sd_k)
    joint = fit_lumped(t_new, y_new, thr, **new_kw)
    if not joint.ok:
        return None
    fc.drop_notes(NoteCode.REGIME_CHANGE)
    fc.note(
        NoteCode.REGIME_RETURNED,
        f"the surroundings changed and came back: the {old.n} readings before the change agree "
        f"with the newest {t_new.size}, so their time constant (about "
        f"{1 / old.k_per_s / 3600:.3g} h, as a prior) is carried into the newest fit",
    )
    fc.regime_start = float(t_new[0])
    return Carried(new_kw, joint, t_new, y_new)


def moves_away(t: np.ndarray, y: np.ndarray, ambient: float) -> bool:
    """Whether the readings clearly move away from ``ambient`` (their straight trend's slope
    beyond 3 se, against the side the ambient is on): a compressor pulling the load back is not
    the older curve going on, whatever a fit toward that ambient makes of a few readings."""
    if t.size < 3:
        return False
    d = t - t[0]
    slope, icpt = np.polyfit(d, y, 1)
    resid = y - (icpt + slope * d)
    sxx = float(np.sum((d - d.mean()) ** 2))
    if sxx <= 0:
        return False
    se = math.sqrt(max(float(resid @ resid) / max(t.size - 2, 1), 1e-12) / sxx)
    # residuals correlated from one reading to the next (a fast logger, coarse steps, a wobbling
    # room) carry fewer independent readings than they number: the slope's se grows with that
    se *= math.sqrt(lag_inflation(resid))
    return abs(slope) > 3 * se and slope * (ambient - y[-1]) < 0


def carry_agrees(old: LumpedFit, sd_k: float, alone: LumpedFit, kw: dict) -> bool:
    """Whether the newest readings, fitted on their own, go on along the older curve's k and
    ambient (see carry_before)."""
    if not alone.ok:
        return False  # too few readings after the located start: the older curve does not go on
    if not agrees(
        math.log(old.k_per_s),
        sd_k,
        math.log(alone.k_per_s),
        log_sd(alone.k_lo, alone.k_hi, alone.k_per_s),
    ):
        return False
    if kw.get("ambient") is None:
        sd_new = lin_sd(alone)
        # an ambient the newest readings cannot bound (a few readings) cannot be tested
        return sd_new is None or agrees(old.ambient, lin_sd(old), alone.ambient, sd_new)
    if kw.get("ambient_sd", 0.0) > 0:
        # a given ambient must hold for both: the older readings followed it, and the newest
        # ones, fitted on their own, do not pull the ambient away from it
        near = CARRY_Z * kw["ambient_sd"]
        return (
            abs(old.ambient - kw["ambient"]) <= near and abs(alone.ambient - kw["ambient"]) <= near
        )
    return True
