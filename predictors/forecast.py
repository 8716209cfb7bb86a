"""Top-level forecast: clean the readings, find the current regime, fit, predict the crossing.

    readings -> cleaning (order, duplicates, Hampel) -> regime (data since the last change)
             -> model (lumped: fitted / known / measured ambient; conduction: slab, cylinder,
                sphere; auto: the lower AICc) -> robust refit -> Forecast

Never raises on bad data: a failed fit is a Forecast with ok=False and a reason.  Bad arguments
(an unknown model, mismatched lengths) raise ValueError.
"""

from __future__ import annotations

import importlib
import math

import numpy as np
from numpy.typing import ArrayLike
from scipy.stats import t as t_dist
from thermeta.predictors.cleaning import clean, residual_outliers
from thermeta.predictors.cycling import cycle_trend
from thermeta.predictors.few import assumed_scatter, known_few
from thermeta.predictors.lumped import LumpedFit, fit_lumped
from thermeta.predictors.measured import (
    FewAir,
    air_identified,
    fit_air,
    fit_measured,
    held_air,
    measured_rss,
    steady_air,
    straight_air,
)
from thermeta.predictors.prior import Prior
from thermeta.predictors.regime import (
    MIN_REGIME_POINTS,
    find_door,
    find_regime,
    oldest_regime_end,
    split_disturbance,
)
from thermeta.predictors.result import Forecast
from thermeta.predictors.wording import DisplayUnit, point, showing, step

MODELS = ("lumped", "slab", "cylinder", "sphere", "auto")
CONDUCTION = ("slab", "cylinder", "sphere")
Z90 = 1.6448536269514722  # the standard normal's 95th percentile (two-sided 90 %)
AMBIENT_UNCERTAINTY = 2.5  # a "known" ambient is typically known to a couple of degrees
# "the given ambient is right to within +-w" is a bound with nothing known of where inside it:
# the rectangular distribution's standard uncertainty u = w / sqrt(3) (GUM, JCGM 100:2008,
# 4.3.7, from memory), folded into the fit as a Gaussian prior of that sd
WITHIN_DIVISOR = math.sqrt(3.0)
MIN_POINTS = 5  # three parameters and two degrees of freedom for the residual scatter
MIN_POINTS_KNOWN = 4  # a given ambient is one more observation; a measured one leaves 2 parameters
MIN_FEW_POINTS = 2  # fewer than a curve fit needs: the two-reading solve, or a straight trend


def ambient_sd_within(within: float) -> float:
    """The sd of a given ambient said to be right to within +-``within``: within / sqrt(3)."""
    if not math.isfinite(within) or within < 0:
        raise ValueError(f"ambient_within must be a number >= 0, got {within!r}")
    return float(within) / WITHIN_DIVISOR


def forecast(
    t: ArrayLike,
    y: ArrayLike,
    threshold: float,
    *,
    model: str = "lumped",
    ambient: float | None = None,
    ambient_t: ArrayLike | None = None,
    ambient_y: ArrayLike | None = None,
    window_s: float | None = None,
    min_points: int | None = None,
    ambient_bounds: tuple[float, float] | None = None,
    ambient_uncertainty: float = AMBIENT_UNCERTAINTY,
    detect_regimes: bool = True,
    limit: str | None = None,
    prior: Prior | None = None,
    shown: DisplayUnit | None = None,
) -> Forecast:
    """Forecast when the series ``y(t)`` crosses ``threshold``.

    t: epoch seconds (any order, duplicates allowed); y: temperatures in one unit.
    ambient: a known constant ambient (known mode), trusted to about +-ambient_uncertainty
    (a sd, folded into the intervals; 0 = exact); ambient_t/ambient_y: an ambient probe series
    (measured mode); neither: the ambient is fitted within ambient_bounds (default: a wide range
    around the readings).  window_s caps the history used.  min_points: the fewest readings to
    fit (default None: the fewest the model can fit with an honest interval, 4 with a given or
    measured ambient, 5 otherwise; below that, down to 2 readings, a given ambient gives the
    two-reading solve and a fitted one a straight trend with an open late end, both with an
    interval from the assumed reading scatter (:mod:`thermeta.predictors.few`); one reading is
    "too few readings to fit"; the intervals' F(1, n - p) cut-offs widen with few readings).
    limit: "upper" (only an upward crossing counts; at or above is past), "lower", or None
    (either way; past means the curve crossed within the data).  prior: k (and, with the
    ambient fitted, the ambient) learned from past episodes of the item's class
    (:mod:`thermeta.predictors.prior`), folded into the lumped fit as Gaussian penalties; not
    used by the measured-ambient and conduction models.  shown: the unit the caller shows
    temperatures in, when it converted them for the call (:mod:`thermeta.predictors.wording`):
    the warnings print theirs in it; None: as passed in.  It changes no number of the result.
    """
    if model not in MODELS:
        raise ValueError(f"model must be one of {', '.join(MODELS)}, got {model!r}")
    if not math.isfinite(float(threshold)):
        raise ValueError(f"threshold must be a finite number, got {threshold!r}")
    if limit not in (None, "upper", "lower"):
        raise ValueError(f"limit must be 'upper', 'lower' or None, got {limit!r}")
    if ambient_uncertainty < 0:
        raise ValueError("ambient_uncertainty must be >= 0")
    if shown is not None and not isinstance(shown, DisplayUnit):
        raise ValueError(f"shown must be a DisplayUnit or None, got {shown!r}")
    ta, ya = np.asarray(t, dtype=float).ravel(), np.asarray(y, dtype=float).ravel()
    if ta.shape != ya.shape:
        raise ValueError(f"t and y must have the same length ({ta.size} != {ya.size})")
    measured = ambient_y is not None and ambient_t is not None and np.asarray(ambient_y).size > 0
    if ambient is not None and not math.isfinite(float(ambient)):
        ambient = None
    mode = "measured" if measured else ("known" if ambient is not None else "fitted")
    fc = Forecast(threshold=float(threshold), model=model, ambient_mode=mode, n_points=0)
    few = min_points is None and model == "lumped"
    if min_points is None:
        # a given ambient is one more piece of information (the lumped fit's Gaussian prior)
        # (a measured ambient leaves the load two parameters, T0 and k)
        # (a core shape with a given or measured ambient has three: Ti, Bi and a; with one degree
        # of freedom left its scatter is taken as at least the assumed one, conduction_profile)
        min_points = MIN_POINTS_KNOWN if mode != "fitted" else MIN_POINTS
    try:
        # overflow in a far-off corner of a grid is expected and handled; keep logs quiet
        with np.errstate(all="ignore"), showing(shown):
            return _forecast(
                fc,
                ta,
                ya,
                float(threshold),
                model,
                ambient,
                ambient_t,
                ambient_y,
                window_s,
                min_points,
                ambient_bounds,
                ambient_uncertainty,
                detect_regimes,
                limit,
                prior,
                few,
            )
    except (ValueError, FloatingPointError, ArithmeticError, np.linalg.LinAlgError) as exc:
        fc.ok, fc.reason = False, f"fit failed: {exc}"
        return fc


def _forecast(
    fc,
    t,
    y,
    thr,
    model,
    ambient,
    ambient_t,
    ambient_y,
    window_s,
    min_points,
    bounds,
    amb_sd,
    detect,
    limit,
    prior=None,
    few=False,
) -> Forecast:
    cl = clean(t, y)
    tt, yy = cl.t, cl.y
    if window_s is not None and tt.size:
        sel = tt >= tt[-1] - window_s
        tt, yy = tt[sel], yy[sel]
    fc.n_outliers = cl.n_outliers
    if cl.n_duplicates:
        fc.warnings.append(f"{cl.n_duplicates} readings shared a timestamp; merged by their median")
    if cl.n_nonfinite:
        fc.warnings.append(f"{cl.n_nonfinite} readings were not finite numbers; ignored")
    if tt.size == 0:
        fc.ok, fc.reason = False, "no readings"
        return fc
    fc.t_last, fc.value_now = float(tt[-1]), float(yy[-1])
    fc.n_points = int(tt.size)
    fc.regime_start = float(tt[0])
    if few and MIN_FEW_POINTS <= tt.size < min_points:
        if fc.ambient_mode != "measured":
            return _few_readings(fc, tt, yy, thr, ambient, amb_sd, limit, cl)
        # against a measured air two readings determine T0 and k; their scatter is assumed
        min_points = MIN_FEW_POINTS
    if tt.size < min_points:
        fc.ok, fc.reason = False, f"too few readings to fit ({tt.size} < {min_points})"
        return fc
    air, before = None, None
    if fc.ambient_mode == "measured":
        air = clean(np.asarray(ambient_t, float), np.asarray(ambient_y, float))
        if air.t.size < (MIN_FEW_POINTS if few else 4):
            fc.ok, fc.reason = False, f"too few ambient readings ({air.t.size})"
            return fc
    # the measured air explains changes of the surroundings, so only the other modes cut regimes;
    # the search tests lumped curves, which a lagging centre probe misfits by nature, so the core
    # models (and "auto", which may pick one) keep the window whole
    if detect and fc.ambient_mode != "measured" and model == "lumped":
        reg = find_regime(tt, yy, cl.noise_sd, min_points=max(12, min_points))
        if reg.cycling and reg.start_index == 0:
            # a thermostat's sawtooth: a curve through it extrapolates the window's ends
            return _cycling(fc, tt, yy, thr, cl.noise_sd, limit)
        if reg.note:
            fc.warnings.append(reg.note)
        if reg.start_index > 0:
            fc.warnings.append(
                f"the surroundings changed {reg.n_changes} time(s); fitted the newest "
                f"{tt.size - reg.start_index} readings only"
            )
            end = oldest_regime_end(tt, yy, cl.noise_sd, reg, min_points=max(12, min_points))
            if end:
                before = (tt, yy, end, True)
            tt, yy = tt[reg.start_index :], yy[reg.start_index :]
            fc.regime_start = float(tt[0])
        elif not reg.cycling:
            end = _short_door(tt, yy, max(12, min_points))
            if end:
                before = (tt, yy, end, False)
    if prior is not None and prior.n_episodes and (model in CONDUCTION or air is not None):
        fc.warnings.append(
            "the learned prior is used by the lumped model with a fitted or "
            "given ambient only; not here"
        )
    start = _first_reading(t, y, tt, window_s)
    if model in CONDUCTION:
        return _conduction(
            fc, tt, yy, thr, model, ambient, air, amb_sd, start_s=start, min_points=min_points
        )
    if model == "auto":
        return _auto(
            fc,
            tt,
            yy,
            thr,
            ambient,
            air,
            bounds,
            amb_sd,
            cl,
            limit,
            prior,
            start_s=start,
            min_points=min_points,
        )
    out = _lumped(
        fc, tt, yy, thr, ambient, air, bounds, amb_sd, cl, limit, detect, min_points, prior, before
    )
    if few and air is None and not out.ok and (out.reason or "").startswith("too few readings"):
        # the robust refit set a reading aside and left fewer than the fit needs
        out.ok, out.reason = True, None
        return _few_readings(out, tt, yy, thr, ambient, amb_sd, limit, cl)
    return out


def _lumped(
    fc,
    tt,
    yy,
    thr,
    ambient,
    air,
    bounds,
    amb_sd,
    cl,
    limit=None,
    detect=True,
    min_points=8,
    prior=None,
    before=None,
) -> Forecast:
    fc.model = "lumped" if fc.model != "auto" else fc.model
    fc.lag_factor_j = 1.0
    if air is not None:
        return _measured(fc, tt, yy, thr, air, limit, detect, cl.noise_sd, min_points)
    kw = {
        "ambient": ambient,
        "ambient_sd": amb_sd if ambient is not None else 0.0,
        "bounds": bounds,
        "noise_sd": cl.noise_sd,
        "limit": limit,
    }
    k_prior = prior.k_prior() if prior is not None else None
    a_prior = prior.ambient_prior() if prior is not None and ambient is None else None
    if k_prior is not None:
        kw["k_prior"] = k_prior
    if a_prior is not None:
        # the learned ambient is a Gaussian prior, the same penalty as a given one
        kw["ambient"], kw["ambient_sd"] = a_prior
    fit = fit_lumped(tt, yy, thr, **kw)
    carried = _carry_before(fc, fit, kw, before, tt, yy, thr) if before is not None else None
    if carried is not None:
        kw, fit, tt, yy = carried
    if fit.ok:
        # robust refit: drop what the first fit calls far off (beyond the Hampel pre-filter)
        out = residual_outliers(
            fit.residuals, 4.0, floor=max(cl.quantum, cl.noise_sd, 1e-3 * float(np.ptp(yy)))
        )
        if 0 < out.sum() <= max(1, int(0.1 * tt.size)):
            tt, yy = tt[~out], yy[~out]
            fc.n_outliers += int(out.sum())
            fit = fit_lumped(tt, yy, thr, **kw)
    if not fit.ok:
        fc.ok, fc.reason = False, fit.reason
        return fc
    _fill_lumped(fc, fit, ambient, amb_sd)
    if k_prior is not None and carried is None:
        # (carried: the older readings' fit already folded the learned prior into its k)
        _note_prior(fc, prior, k_prior, a_prior)
    return fc


def _short_door(tt, yy, min_points: int, margin: int = 2) -> int:
    """End of the readings before a short disturbance (regime.find_door) that the regime search
    cannot see, or 0.  The door is first placed with the whole window's k and ambient, which it
    biases, then again with those of the readings before it."""
    whole = fit_lumped(tt, yy, float(yy[-1]), intervals=False)
    if not whole.ok:
        return 0
    door = find_door(tt, yy, whole.k_per_s, whole.ambient, whole.rss, min_side=min_points)
    if not door.found:
        return 0
    pre = fit_lumped(tt[: door.c1], yy[: door.c1], float(yy[-1]), intervals=False)
    if pre.ok:
        again = find_door(tt, yy, pre.k_per_s, pre.ambient, whole.rss, min_side=min_points)
        if again.found:
            door = again
    end = door.c1 - margin
    return end if end >= min_points else 0


Z90 = 1.6449  # the two-sided 90 % point of the normal: a 90 % interval spans 2 Z90 sd
CARRY_Z = 3.0  # |z| beyond this: the newest readings contradict the older regime's value


def _log_sd(lo, hi, est) -> float | None:
    """The sd of ln(value) from a 90 % interval; None when an end is open."""
    if lo is None or hi is None or not lo > 0 or not hi > lo or not est > 0:
        return None
    return (math.log(hi) - math.log(lo)) / (2 * Z90)


def _lin_sd(fit: LumpedFit) -> float | None:
    """The sd of the fitted ambient from its 90 % interval; None when it reaches the bounds."""
    lo, hi = fit.ambient_lo, fit.ambient_hi
    if lo is None or hi is None or not hi > lo:
        return None
    if lo <= fit.bounds[0] + 1e-9 or hi >= fit.bounds[1] - 1e-9:
        return None
    return (hi - lo) / (2 * Z90)


def _agrees(a: float, sd_a: float | None, b: float, sd_b: float | None) -> bool:
    """|a - b| <= CARRY_Z combined sd; a missing sd of the newest fit means it cannot tell."""
    if sd_b is None:
        return True
    return abs(a - b) <= CARRY_Z * math.hypot(sd_a or 0.0, sd_b)


def _older_fit(t_all, y_all, end: int, thr: float, kw: dict, margin: int = 2):
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


def _carry_before(fc: Forecast, fit: LumpedFit, kw: dict, before, tt, yy, thr):
    """Carry k from the readings before a change into the newest regime's fit, as a Gaussian
    prior on ln k, when the two agree.

    A door opened and closed again changes neither the load's k nor, once shut, the ambient:
    Newton's law is memoryless, so the load goes on along the same k and ambient from a new start.
    The readings before the door then hold most of what is known of k, and with k known the
    newest regime is located to a reading or two (regime.split_disturbance) instead of to the
    dozen readings the blind search needs.  A real change of the surroundings (chiller water
    switched, a new set point) shows as a newest fit whose k or fitted ambient lies beyond CARRY_Z
    combined sd of the older one, as too few readings after the located start to fit at all, or
    as older readings that did not follow a given ambient: then the newest readings stand alone,
    as found by the blind search.  Only k is carried: the older fit's ambient is correlated with
    its k, and the two carried as independent priors made intervals too narrow in trials.
    Returns the keyword arguments, the fit and the readings to go on with, or None (the
    newest regime's own fit stands).
    """
    t_all, y_all, end, cut = before
    old, j = _older_fit(t_all, y_all, end, thr, kw)
    sd_k = _log_sd(old.k_lo, old.k_hi, old.k_per_s) if old.ok else None
    if sd_k is None or not fit.ok:
        return None
    t_new, y_new = t_all[j:], y_all[j:]
    # the default plausible range of the ambient scales with the readings' spread, which a few
    # readings after the change understate: take the older readings' range
    new_kw = dict(kw, bounds=kw.get("bounds") or old.bounds)
    alone = fit_lumped(t_new, y_new, thr, **new_kw)
    toward = kw["ambient"] if kw.get("ambient") is not None else old.ambient
    if _moves_away(t_new, y_new, toward) or not _carry_agrees(old, sd_k, alone, kw):
        if cut:
            fc.warnings.append(
                "the readings before the change follow another curve (k or "
                "ambient differ); they are not used"
            )
        return None
    new_kw["k_prior"] = (math.log(old.k_per_s), sd_k)
    joint = fit_lumped(t_new, y_new, thr, **new_kw)
    if not joint.ok:
        return None
    fc.warnings[:] = [w for w in fc.warnings if not w.startswith("the surroundings changed")]
    fc.warnings.append(
        f"the surroundings changed and came back: the {old.n} readings before the change agree "
        f"with the newest {t_new.size}, so their time constant (about "
        f"{1 / old.k_per_s / 3600:.3g} h, as a prior) is carried into the newest fit"
    )
    fc.regime_start = float(t_new[0])
    return new_kw, joint, t_new, y_new


def _moves_away(t: np.ndarray, y: np.ndarray, ambient: float) -> bool:
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
    return abs(slope) > 3 * se and slope * (ambient - y[-1]) < 0


def _carry_agrees(old: LumpedFit, sd_k: float, alone: LumpedFit, kw: dict) -> bool:
    """Whether the newest readings, fitted on their own, go on along the older curve's k and
    ambient (see _carry_before)."""
    if not alone.ok:
        return False  # too few readings after the located start: the older curve does not go on
    if not _agrees(
        math.log(old.k_per_s),
        sd_k,
        math.log(alone.k_per_s),
        _log_sd(alone.k_lo, alone.k_hi, alone.k_per_s),
    ):
        return False
    if kw.get("ambient") is None:
        sd_new = _lin_sd(alone)
        # an ambient the newest readings cannot bound (a few readings) cannot be tested
        return sd_new is None or _agrees(old.ambient, _lin_sd(old), alone.ambient, sd_new)
    if kw.get("ambient_sd", 0.0) > 0:
        # a given ambient must hold for both: the older readings followed it, and the newest
        # ones, fitted on their own, do not pull the ambient away from it
        near = CARRY_Z * kw["ambient_sd"]
        return (
            abs(old.ambient - kw["ambient"]) <= near and abs(alone.ambient - kw["ambient"]) <= near
        )
    return True


def _cycling(fc: Forecast, tt, yy, thr, noise_sd, limit) -> Forecast:
    """The readings cycle: forecast from the drift of the cycle means (predictors.cycling)."""
    tr = cycle_trend(tt, yy, thr, noise_sd, limit)
    fc.pattern = "cycling"
    fc.eta_s, fc.eta_lo_s, fc.eta_hi_s = tr.eta_s, tr.eta_lo_s, tr.eta_hi_s
    fc.direction = "rising" if tr.drift_per_s > 0 else "falling"
    fc.interval_method = "t interval of the drift of the cycle means"
    fc.params = {
        "n_cycles": float(tr.n_cycles),
        "cycle_mean": tr.mean_now,
        "half_swing": tr.half_swing,
        "drift_per_s": tr.drift_per_s,
        "drift_se_per_s": tr.drift_se,
        "n_fit": float(tt.size),
    }
    text = (
        f"the readings cycle (a thermostat?) around {point(tr.mean_now, '.3g')} +- "
        f"{step(tr.half_swing, '.2g')} over {tr.n_cycles} full cycle(s)"
    )
    if tr.beyond_horizon:
        fc.warnings.append(
            text + f"; their mean drifts by {step(tr.drift_per_s * 3600, '+.2g')} "
            "per hour toward the threshold, too slowly to forecast a crossing "
            "from these readings (it would lie beyond twice their span)"
        )
    elif tr.significant:
        fc.warnings.append(
            text + f"; their mean drifts by {step(tr.drift_per_s * 3600, '+.2g')} "
            "per hour, so the swing's edge is extrapolated to the threshold"
        )
    else:
        fc.warnings.append(
            text + "; no drift toward the threshold that the cycles can tell "
            "from zero, so no crossing is forecast while they hold"
        )
    return fc


def _few_readings(fc: Forecast, tt, yy, thr, ambient, amb_sd, limit, cl) -> Forecast:
    """Fewer readings than a curve fit needs: with the ambient given, the lumped curve through
    them (two readings determine T0 and k); with it fitted, the straight trend."""
    sigma = assumed_scatter(yy, cl.noise_sd, cl.quantum)
    if ambient is None:
        return _few_trend(fc, tt, yy, thr, limit, sigma)
    fit = known_few(tt, yy, thr, float(ambient), amb_sd, sigma, limit)
    if not fit.ok:
        return _few_trend(fc, tt, yy, thr, limit, sigma)
    fc.model, fc.lag_factor_j = "lumped", 1.0
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
    fc.warnings.append(
        f"only {tt.size} readings: the curve toward the given ambient through them, with their "
        f"scatter taken as {step(sigma, '.2g')} (1 sd, not measured) and the ambient as uncertain "
        f"by {step(amb_sd)}; the interval is wide for that"
    )
    if fc.eta_s is None:
        fc.warnings.append(never_reason(fc))
    return fc


def _few_trend(fc: Forecast, tt, yy, thr, limit, sigma: float) -> Forecast:
    """Too few readings for a curve with the ambient fitted: the straight trend through them,
    T(x) = T_now + s x, with the slope's one-sided 95 % bound as the early end and an open late
    end (the curve may level off; nothing here says where).  The scatter is at least ``sigma``
    (the assumed scatter of few.assumed_scatter), which a line through two or three readings
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
    fc.direction = "rising" if slope > 0 else "falling"
    fc.rmse = math.sqrt(s2)
    fc.params = {
        "slope_per_s": float(slope),
        "slope_se_per_s": se,
        "value_fit_now": now,
        "n_fit": float(tt.size),
        "n_params": 2.0,
    }
    fc.warnings.append(
        f"only {tt.size} readings: a straight trend, not a curve, and the "
        "interval's late end is open (the curve may level off)"
    )
    toward = 1.0 if (thr > now if limit is None else limit == "upper") else -1.0
    if (thr - now) * toward <= 0:
        fc.eta_s = fc.eta_lo_s = fc.eta_hi_s = 0.0
        return fc
    if slope * toward <= 0:
        fc.warnings.append(never_reason(fc))
        return fc
    q95 = float(t_dist.ppf(0.95, dof)) if dof > 0 else Z90
    fast = slope * toward + q95 * se
    fc.eta_s = (thr - now) / slope  # T_now + s eta = thr
    fc.eta_lo_s, fc.eta_hi_s = abs(thr - now) / fast, None
    return fc


def _note_prior(fc: Forecast, prior: Prior, k_prior, a_prior) -> None:
    """Say that a learned prior was used, and when the readings contradict it."""
    tau_h = math.exp(-k_prior[0]) / 3600.0
    text = (
        f"a prior learned from {prior.n_episodes} past episode(s) is folded in "
        f"(time constant about {tau_h:.3g} h"
    )
    if a_prior is not None:
        text += f", ambient about {point(a_prior[0], '.3g')} +- {step(a_prior[1], '.2g')}"
    fc.warnings.append(text + ")")
    fc.params["prior_episodes"] = float(prior.n_episodes)
    z = (math.log(fc.k_per_s) - k_prior[0]) / k_prior[1] if fc.k_per_s else 0.0
    if abs(z) > 2.0:
        fc.warnings.append(
            f"the readings disagree with the learned prior (k {math.exp(z * k_prior[1]):.2g} x "
            "the class's usual); is this a different product or setup?"
        )


def _fill_lumped(fc: Forecast, fit: LumpedFit, ambient, amb_sd) -> None:
    fc.k_per_s, fc.k_lo_per_s, fc.k_hi_per_s = fit.k_per_s, fit.k_lo, fit.k_hi
    fc.ambient, fc.ambient_lo, fc.ambient_hi = fit.ambient, fit.ambient_lo, fit.ambient_hi
    fc.eta_s, fc.eta_lo_s, fc.eta_hi_s = fit.eta_s, fit.eta_lo_s, fit.eta_hi_s
    fc.direction = fit.direction
    fc.rmse = fit.sigma
    fc.interval_method = "profile likelihood"
    fc.params = {
        "t_first": fit.t_first,
        "amplitude": fit.amplitude,
        "ambient": fit.ambient,
        "k_per_s": fit.k_per_s,
        "value_fit_now": fit.value_fit_now,
        "rss": fit.rss,
        "n_fit": float(fit.n),
        "n_params": float(fit.n_par),
    }
    if fit.bend_kept < 1.0:
        # the point ETA follows the fit's present value and slope with the bend shrunk (lumped)
        fc.params.update(k_ahead_per_s=fit.bend_kept * fit.k_per_s, ahead_from_t=fit.t_last)
    if fit.trend_now is not None:
        fc.params.update(ahead_value=fit.trend_now[0], ahead_slope_per_s=fit.trend_now[1])
    if ambient is not None and amb_sd > 0:
        fc.warnings.append(
            f"the given ambient {point(ambient)} is taken as uncertain by about {step(amb_sd)} "
            "(1 sd); the intervals include that"
        )
    if (
        fc.ambient_mode == "fitted"
        and fc.ambient_lo is not None
        and fc.ambient_hi is not None
        and fc.value_now is not None
        and fc.ambient_hi - fc.ambient_lo > max(10.0, abs(fc.ambient - fc.value_now))
    ):
        fc.warnings.append(
            "the ambient is poorly determined by the readings so far; "
            "give it (--ambient) or measure it for a firmer forecast"
        )
    if fit.trend_now is not None:
        fc.warnings.append(
            "the best fit levels off short of the threshold, but the readings show no "
            "significant bend: the ETA follows their straight trend, which gets there within "
            "as long again as they have been watched; the interval spans every curve they allow"
        )
    elif fit.straight:
        fc.warnings.append(
            "no significant bend in the readings yet, so the ambient and k are barely known: the "
            "ETA extrapolates the present slope (early if the curve levels off); the interval "
            "spans every curve the readings allow"
        )
    elif fit.bend_kept < 0.995:  # shown as a whole percent below 100
        fc.warnings.append(
            f"the bend in the readings is weak: the ETA keeps {100 * fit.bend_kept:.0f} % of the "
            "fitted bend ahead (k and the ambient are poorly known); the interval spans every "
            "curve the readings allow"
        )
    if fc.eta_s is None:
        fc.warnings.append(never_reason(fc))
        if fc.eta_lo_s is not None and 0 < fc.eta_lo_s < math.inf:
            fc.params["eta_earliest_s"] = fc.eta_lo_s
            fc.warnings.append(
                "the readings do not rule a crossing out: the earliest they allow is in "
                f"{fc.eta_lo_s / 60:.0f} min (the interval's early end; its late end is open)"
            )


def never_reason(fc: Forecast) -> str:
    """Why there is no crossing: moving away from the threshold, or levelling off short of it."""
    if fc.value_now is not None and fc.direction is not None:
        away = (fc.direction == "rising") == (fc.value_now > fc.threshold)
        if away:
            return (
                "the readings move away from the threshold without having crossed it; "
                "give the limit's side (upper/lower) if being beyond it already counts"
            )
    return "the fitted curve levels off before the threshold"


def _measured(
    fc, tt, yy, thr, air, limit=None, detect=True, noise_sd=0.0, min_points=8
) -> Forecast:
    at, ay = air.t, air.y
    if at[-1] < tt[-1] - max(600.0, 3 * float(np.median(np.diff(at))) if at.size > 1 else 600.0):
        fc.warnings.append(
            f"the ambient's newest reading is {(tt[-1] - at[-1]) / 60:.0f} min "
            "older than the item's; the ambient is extrapolated over the gap"
        )
    reg = find_regime(at, ay, air.noise_sd)
    if reg.start_index > 0:
        fc.warnings.append("the ambient changed; its forecast uses the readings since")
    if reg.cycling and reg.start_index == 0:
        # a thermostat holds the air: extrapolate its mean, not a curve through one sawtooth
        a_fit = steady_air(at, ay, n_runs=reg.n_changes + 1)
        fc.warnings.append("the ambient cycles (a thermostat?); its mean is carried forward")
    else:
        a_fit = fit_air(at[reg.start_index :], ay[reg.start_index :], air.noise_sd)
    spread = None
    few_air = isinstance(a_fit, FewAir)
    if not few_air and a_fit.ok and not air_identified(a_fit):
        # where the air is heading is not clear yet (a short stretch, an off-cycle): the air held
        # at its present level decides whether a crossing is forecast at all; its time is then
        # the median over the fitted trend's doubt, which the interval keeps too
        spread, a_fit = a_fit, held_air(a_fit)
        fc.warnings.append(
            "the ambient's trend is not clear yet; held at its present level, "
            "and a crossing that holds then is forecast at the median of the "
            "ambient fit's spread"
        )
    fit = fit_measured(tt, yy, at, ay, thr, air_fit=a_fit, limit=limit, air_spread=spread)
    if few_air and not a_fit.straight and fit.ok and fit.eta_s is None:
        # a bend through four noisy air readings cannot rule a crossing out: the straight trend
        a_fit = straight_air(at[reg.start_index :], ay[reg.start_index :], air.noise_sd)
        fit = fit_measured(tt, yy, at, ay, thr, air_fit=a_fit, limit=limit)
    straight = few_air and a_fit.straight
    if few_air:
        fc.warnings.append(_few_air_note(int(at.size), straight))
    if not fit.ok:
        fc.ok, fc.reason = False, fit.reason
        return fc
    if detect:
        # the air explains most changes; what it cannot (a pump started, a lid put on) shows as
        # a misfit of the load against the air: then keep only the readings since
        load_reg = find_regime(
            tt,
            yy,
            noise_sd,
            min_points=max(12, min_points),
            n_params=2,
            fit_sigma=fit.sigma,
            rss=lambda i0, i1: measured_rss(tt[i0:i1], yy[i0:i1], at, ay),
            exact=lambda i0, i1: measured_rss(tt[i0:i1], yy[i0:i1], at, ay, exact=True),
        )
        if load_reg.start_index > 0 and not load_reg.cycling:
            fc.warnings.append(
                f"the load changed against its ambient {load_reg.n_changes} time(s); fitted the "
                f"newest {tt.size - load_reg.start_index} readings only"
            )
            tt, yy = tt[load_reg.start_index :], yy[load_reg.start_index :]
            fc.regime_start = float(tt[0])
            fit = fit_measured(tt, yy, at, ay, thr, air_fit=a_fit, limit=limit, air_spread=spread)
            if not fit.ok:
                fc.ok, fc.reason = False, fit.reason
                return fc
    out = residual_outliers(
        np.asarray(fit.residuals), 4.0, floor=max(air.quantum, 1e-3 * float(np.ptp(yy)), 1e-9)
    )
    # (a refit needs readings to spare: not with fewer than a curve through a measured air needs)
    if 0 < out.sum() <= max(1, int(0.1 * tt.size)) and tt.size - out.sum() >= MIN_POINTS_KNOWN:
        fc.n_outliers += int(out.sum())
        fit = fit_measured(
            tt[~out], yy[~out], at, ay, thr, air_fit=a_fit, limit=limit, air_spread=spread
        )
    fc.k_per_s, fc.k_lo_per_s, fc.k_hi_per_s = fit.k_per_s, fit.k_lo, fit.k_hi
    if a_fit.ok and not straight:
        fc.ambient, fc.ambient_lo, fc.ambient_hi = a_fit.ambient, a_fit.ambient_lo, a_fit.ambient_hi
    elif not a_fit.ok:
        fc.warnings.append(f"the ambient series could not be fitted ({a_fit.reason})")
    fc.eta_s, fc.eta_lo_s, fc.eta_hi_s = fit.eta_s, fit.eta_lo_s, fit.eta_hi_s
    fc.direction = fit.direction
    fc.rmse = fit.sigma
    fc.interval_method = "parametric draws from the load and ambient fit covariances"
    fc.params = {
        "T0": fit.T0,
        "t_first": float(tt[0]),
        "k_per_s": fit.k_per_s,
        "value_fit_now": fit.value_fit_now,
        "rss": fit.rss,
        "n_fit": float(fit.n),
        "n_params": 2.0,
    }
    if a_fit.ok:
        fc.params.update(
            air_ambient=a_fit.ambient, air_k_per_s=a_fit.k_per_s, air_value_now=a_fit.value_fit_now
        )
    if not (reg.cycling and reg.start_index == 0) and spread is None and not few_air:
        fc.warnings.append("ambient measured; its asymptote is fitted from the ambient readings")
    if fc.eta_s is None:
        fc.warnings.append(never_reason(fc))
    return fc


def _few_air_note(n_air: int, straight: bool) -> str:
    if straight:
        return (
            f"only {n_air} ambient readings: the ambient's straight trend is extrapolated (it "
            "may level off sooner, so the crossing is early and the interval's late end open)"
        )
    return (
        f"only {n_air} ambient readings: the ambient's curve through them is extrapolated, "
        "their scatter assumed; the interval is wide for that"
    )


def _first_reading(t, y, tt, window_s) -> float | None:
    """The earliest reading of the window, kept or not by the cleaning: the core models' episode
    start.  A first reading the spike filter sets aside (the lag of a centre probe's flat start
    can look like one) still marks when the episode began; starting the curve at the next kept
    reading instead shifts it by a sampling step, a bias that early forecasts have no
    parameter for (seen on seeded centre cases: the truth then fails the interval's test by
    far)."""
    if tt.size == 0:
        return None
    t, y = np.asarray(t, float), np.asarray(y, float)
    raw = t[np.isfinite(t) & np.isfinite(y)]
    if window_s is not None:
        raw = raw[raw >= tt[-1] - window_s]
    return float(min(raw.min(), tt[0])) if raw.size else float(tt[0])


def _conduction_kwargs(ambient, air, amb_sd, start_s=None, min_points=None) -> dict:
    """How fit_conduction is told the ambient (a measured series, a given value, or nothing),
    when known the episode start, and the fewest readings to fit."""
    kw: dict = {} if start_s is None else {"start_s": float(start_s)}
    if min_points is not None:
        kw["min_points"] = int(min_points)
    if air is not None:
        return {**kw, "ambient_t": air.t, "ambient_y": air.y}
    if ambient is not None:
        return {**kw, "ambient": float(ambient), "ambient_sd": float(amb_sd)}
    return kw


def _conduction(
    fc, tt, yy, thr, shape, ambient, air, amb_sd=0.0, fit=None, start_s=None, min_points=None
) -> Forecast:
    """A core-probe forecast; ``fit`` is an already fitted curve of that shape (from _auto)."""
    if fit is None:
        try:
            conduction = importlib.import_module("thermeta.predictors.conduction")
        except ImportError:
            fc.ok, fc.reason = False, "conduction model not available"
            return fc
        fit = conduction.fit_conduction(
            tt, yy, shape, **_conduction_kwargs(ambient, air, amb_sd, start_s, min_points)
        )
    fc.model_fit = fit
    fc.model = shape
    if not fit.ok:
        fc.ok, fc.reason = False, fit.reason
        return fc
    eta, lo, hi = fit.time_to_threshold(thr, t_now=float(tt[-1]))
    fc.eta_s, fc.eta_lo_s, fc.eta_hi_s = eta, lo, hi
    fc.k_per_s = fit.k_per_s
    fc.k_lo_per_s = getattr(fit, "k_lo_per_s", None)
    fc.k_hi_per_s = getattr(fit, "k_hi_per_s", None)
    fc.ambient, fc.ambient_lo, fc.ambient_hi = fit.Ta, fit.ambient_lo, fit.ambient_hi
    fc.warnings.extend(getattr(fit, "warnings", []) or [])
    fc.biot, fc.lag_factor_j = fit.biot, fit.lag_factor_j
    fc.rmse = fit.rmse
    fc.interval_method = fit.interval_method
    now = fit.value_at_last
    fc.direction = "rising" if fit.Ta > now else "falling"
    fc.params = {
        "biot": fit.biot,
        "a_per_s": fit.a_per_s,
        "Ti": fit.Ti,
        "t0_s": fit.t0_s,
        "aicc": fit.aicc,
        "rss": fit.rss,
        "n_fit": float(fit.n_points),
        "n_params": float(fit.n_params),
    }
    if ambient is not None and amb_sd > 0:
        fc.warnings.append(
            f"the given ambient {point(ambient)} is taken as uncertain by about {step(amb_sd)} "
            "(1 sd); the intervals include that"
        )
    return fc


def aicc(rss: float, n: int, p: int) -> float:
    """AICc = n ln(RSS/n) + 2p + 2p(p+1)/(n-p-1)."""
    if n - p - 1 <= 0 or rss <= 0:
        return math.inf
    return n * math.log(rss / n) + 2 * p + 2 * p * (p + 1) / (n - p - 1)


AUTO_MARGIN = 2.0  # AICc points a core model must gain over the lumped one (a common rule of thumb)


def _auto(
    fc,
    tt,
    yy,
    thr,
    ambient,
    air,
    bounds,
    amb_sd,
    cl,
    limit,
    prior=None,
    start_s=None,
    min_points=None,
) -> Forecast:
    """The lumped model, unless the best core-probe shape has a clearly lower AICc.

    All three shapes have the same parameters (Ti, [Ta,] Bi, a), so among them the lowest AICc
    is the lowest residual sum: the best shape is kept however small its lead over the other
    two (:func:`conduction.select_geometry`).  Only against the lumped curve, the simpler
    family, must it win by AUTO_MARGIN; a Newton curve is then kept on a tie.  Only the chosen
    shape's crossing interval is computed (the profile refits are most of the cost).
    """
    import copy

    base = copy.deepcopy(fc)
    lumped = _lumped(
        copy.deepcopy(fc), tt, yy, thr, ambient, air, bounds, amb_sd, cl, limit, prior=prior
    )
    lumped.model = "lumped"
    if not lumped.ok or "rss" not in lumped.params:
        return lumped
    p = lumped.params
    lumped_ic = aicc(p["rss"], int(p["n_fit"]), int(p["n_params"]))
    try:
        conduction = importlib.import_module("thermeta.predictors.conduction")
    except ImportError:
        return lumped
    fit, scores = conduction.select_geometry(
        tt, yy, **_conduction_kwargs(ambient, air, amb_sd, start_s, min_points)
    )
    best = lumped
    if fit.ok and fit.aicc < lumped_ic - AUTO_MARGIN:
        best = _conduction(
            copy.deepcopy(base), tt, yy, thr, fit.geometry, ambient, air, amb_sd, fit=fit
        )
        if not best.ok:
            best = lumped
    scores["lumped"] = lumped_ic
    ref = scores[best.model]
    others = ", ".join(
        f"{m} {v - ref:+.1f}" for m, v in scores.items() if m != best.model and math.isfinite(v)
    )
    best.warnings.append(
        f"model chosen by AICc: {best.model}" + (f" (others: {others})" if others else "")
    )
    return best
