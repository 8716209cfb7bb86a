"""Top-level forecast: clean the readings, find the current regime, fit, predict the crossing.

    readings -> cleaning (order, duplicates, Hampel) -> regime (data since the last change)
             -> a model of the table in predictors.model (lumped: fitted / given / measured
                ambient; slab, cylinder, sphere; auto) -> Forecast

Fewer readings than a curve needs go to predictors.few, a thermostat's sawtooth to
predictors.cycling.  Never raises on bad data: a failed fit is a Forecast with ok=False, a reason
and its code.  Bad arguments (an unknown model, mismatched lengths) raise ValueError.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any

import numpy as np
from numpy.typing import ArrayLike
from thermeta.predictors.carry import short_door
from thermeta.predictors.cleaning import Cleaned, clean
from thermeta.predictors.context import AmbientMode, Before, Context
from thermeta.predictors.cycling import cycling_forecast
from thermeta.predictors.few import few_forecast
from thermeta.predictors.model import MODEL_NAMES, model
from thermeta.predictors.outcome import NoteCode, Reason
from thermeta.predictors.prior import Prior
from thermeta.predictors.regime import find_regime, oldest_regime_end
from thermeta.predictors.result import Forecast
from thermeta.predictors.shared import shared_fits
from thermeta.predictors.wording import DisplayUnit, showing

MODELS = MODEL_NAMES
CONDUCTION = ("slab", "cylinder", "sphere")
AMBIENT_UNCERTAINTY = 2.5  # a "known" ambient is typically known to a couple of degrees
# "the given ambient is right to within +-w" is a bound with nothing known of where inside it:
# the rectangular distribution's standard uncertainty u = w / sqrt(3) (GUM, JCGM 100:2008,
# 4.3.7, from memory), folded into the fit as a Gaussian prior of that sd, and the fitted
# ambient held inside the bound
WITHIN_DIVISOR = math.sqrt(3.0)
MIN_POINTS = 5  # three parameters and two degrees of freedom for the residual scatter
MIN_POINTS_KNOWN = 4  # a given ambient is one more observation; a measured one leaves 2 parameters
MIN_FEW_POINTS = 2  # fewer than a curve fit needs: the two-reading solve, or a straight trend
REGIME_MIN = 12  # the fewest readings on each side of a change of the surroundings


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
    ambient_within: float | None = None,
    detect_regimes: bool = True,
    limit: str | None = None,
    prior: Prior | None = None,
    shown: DisplayUnit | None = None,
) -> Forecast:
    """Forecast when the series ``y(t)`` crosses ``threshold``.

    t: epoch seconds (any order, duplicates allowed); y: temperatures in one unit.
    ambient: a known constant ambient (known mode), trusted to about +-ambient_uncertainty
    (a sd, folded into the intervals; 0 = exact), or said to be right to within
    +-ambient_within (a hard bound on the fitted ambient, with the sd within / sqrt 3);
    ambient_t/ambient_y: an ambient probe series (measured mode); neither: the ambient is
    fitted within ambient_bounds (default: a wide range around the readings).  window_s caps
    the history used.  min_points: the fewest readings to fit (default None: the fewest the
    model can fit with an honest interval, 4 with a given or measured ambient, 5 otherwise;
    below that, down to 2 readings, a given ambient gives the two-reading solve and a fitted
    one a straight trend with an open late end, both with an interval from the assumed reading
    scatter (:mod:`thermeta.predictors.few`); one reading is "too few readings to fit"; the
    intervals' F(1, n - p) cut-offs widen with few readings).  limit: "upper" (only an upward
    crossing counts; at or above is past), "lower", or None (either way; past means the curve
    crossed within the data).  prior: k (and, with the ambient fitted, the ambient) learned
    from past episodes of the item's class (:mod:`thermeta.predictors.prior`), folded into the
    lumped fit as Gaussian penalties; not used by the measured-ambient and conduction models.
    shown: the unit the caller shows temperatures in, when it converted them for the call
    (:mod:`thermeta.predictors.wording`): the warnings print theirs in it; None: as passed in.
    It changes no number of the result.
    """
    chosen = _model(model)
    if not math.isfinite(float(threshold)):
        raise ValueError(f"threshold must be a finite number, got {threshold!r}")
    if limit not in (None, "upper", "lower"):
        raise ValueError(f"limit must be 'upper', 'lower' or None, got {limit!r}")
    if ambient_uncertainty < 0:
        raise ValueError("ambient_uncertainty must be >= 0")
    if ambient_within is not None:
        ambient_uncertainty = ambient_sd_within(ambient_within)
    if shown is not None and not isinstance(shown, DisplayUnit):
        raise ValueError(f"shown must be a DisplayUnit or None, got {shown!r}")
    ta, ya = np.asarray(t, dtype=float).ravel(), np.asarray(y, dtype=float).ravel()
    if ta.shape != ya.shape:
        raise ValueError(f"t and y must have the same length ({ta.size} != {ya.size})")
    measured = ambient_y is not None and ambient_t is not None and np.asarray(ambient_y).size > 0
    if ambient is not None and not math.isfinite(float(ambient)):
        ambient = None
    mode = (
        AmbientMode.MEASURED
        if measured
        else (AmbientMode.KNOWN if ambient is not None else AmbientMode.FITTED)
    )
    fc = Forecast(threshold=float(threshold), model=model, ambient_mode=str(mode), n_points=0)
    few = min_points is None and model == "lumped"
    if min_points is None:
        # a given ambient is one more piece of information (the lumped fit's Gaussian prior)
        # (a measured ambient leaves the load two parameters, T0 and k)
        # (a core shape with a given or measured ambient has three: Ti, Bi and a; with one degree
        # of freedom left its scatter is taken as at least the assumed one, conduction_profile)
        min_points = MIN_POINTS_KNOWN if mode != AmbientMode.FITTED else MIN_POINTS
    ctx = Context(
        threshold=float(threshold),
        limit=limit,
        mode=mode,
        t=ta,
        y=ya,
        ambient=None if ambient is None else float(ambient),
        ambient_sd=float(ambient_uncertainty) if ambient is not None else 0.0,
        ambient_within=None if ambient is None or ambient_within is None else float(ambient_within),
        bounds=ambient_bounds,
        prior=prior,
        min_points=int(min_points),
        few=few,
        detect=detect_regimes,
    )
    try:
        # overflow in a far-off corner of a grid is expected and handled; keep logs quiet
        with np.errstate(all="ignore"), showing(shown):
            return _forecast(ctx, fc, chosen, window_s, ambient_t, ambient_y)
    except (ValueError, FloatingPointError, ArithmeticError, np.linalg.LinAlgError) as exc:
        return fc.fail(Reason.FIT_FAILED, f"fit failed: {exc}")


def _model(name: str):
    try:
        return model(name)
    except ValueError:
        raise ValueError(f"model must be one of {', '.join(MODELS)}, got {name!r}") from None


def _forecast(ctx: Context, fc: Forecast, chosen, window_s, ambient_t, ambient_y) -> Forecast:
    cl = clean(ctx.t, ctx.y)
    tt, yy = cl.t, cl.y
    if window_s is not None and tt.size:
        sel = tt >= tt[-1] - window_s
        tt, yy = tt[sel], yy[sel]
    fc.n_outliers = cl.n_outliers
    if cl.n_duplicates:
        fc.note(
            NoteCode.DUPLICATES,
            f"{cl.n_duplicates} readings shared a timestamp; merged by their median",
        )
    if cl.n_nonfinite:
        fc.note(NoteCode.NOT_FINITE, f"{cl.n_nonfinite} readings were not finite numbers; ignored")
    if tt.size == 0:
        return fc.fail(Reason.NO_READINGS, "no readings")
    fc.t_last, fc.value_now = float(tt[-1]), float(yy[-1])
    fc.n_points = int(tt.size)
    fc.regime_start = float(tt[0])
    start = _first_reading(ctx.t, ctx.y, tt, window_s)
    ctx = ctx.with_readings(tt, yy, noise_sd=cl.noise_sd, quantum=cl.quantum, start_s=start)
    if ctx.few and MIN_FEW_POINTS <= tt.size < ctx.min_points:
        if ctx.mode != AmbientMode.MEASURED:
            return few_forecast(ctx, fc)
        # against a measured air two readings determine T0 and k; their scatter is assumed
        ctx = ctx.with_readings(tt, yy, min_points=MIN_FEW_POINTS)
    if tt.size < ctx.min_points:
        return fc.fail(
            Reason.TOO_FEW_READINGS, f"too few readings to fit ({tt.size} < {ctx.min_points})"
        )
    if ctx.mode == AmbientMode.MEASURED:
        air = clean(np.asarray(ambient_t, float), np.asarray(ambient_y, float))
        if air.t.size < (MIN_FEW_POINTS if ctx.few else 4):
            return fc.fail(Reason.TOO_FEW_AMBIENT, f"too few ambient readings ({air.t.size})")
        ctx = ctx.with_readings(tt, yy, air=air)
    # the measured air explains changes of the surroundings, so only the other modes cut regimes
    if ctx.detect and ctx.mode != AmbientMode.MEASURED and chosen.cuts_regimes:
        ctx = _regime(ctx, fc, cl)
        if fc.pattern == "cycling":
            return cycling_forecast(ctx, fc)
    if ctx.prior is not None and ctx.prior.n_episodes and (not chosen.uses_prior or ctx.air):
        fc.note(
            NoteCode.PRIOR_NOT_USED,
            "the learned prior is used by the lumped model with a fitted or "
            "given ambient only; not here",
        )
    out = chosen.forecast(ctx, fc)
    if ctx.few and ctx.air is None and not out.ok and out.reason_code == Reason.TOO_FEW_READINGS:
        # the robust refit set a reading aside and left fewer than the fit needs
        out.ok, out.reason, out.reason_code = True, None, None
        return few_forecast(ctx, out)
    return out


def _regime(ctx: Context, fc: Forecast, cl: Cleaned) -> Context:
    """The readings since the surroundings last changed (a door, a compressor restart, chiller
    water switched), and the readings before a change that came back; sets ``fc.pattern`` to
    "cycling" when a thermostat's sawtooth fills the window."""
    tt, yy = ctx.t, ctx.y
    side = max(REGIME_MIN, ctx.min_points)
    reg = find_regime(tt, yy, cl.noise_sd, min_points=side, inflation=cl.noise_inflation)
    if reg.cycling and reg.start_index == 0:
        # a thermostat's sawtooth: a curve through it extrapolates the window's ends
        fc.pattern = "cycling"
        return ctx
    if reg.note:
        code = NoteCode.CYCLING_STOPPED if reg.cycling else NoteCode.CYCLING
        fc.note(code, reg.note)
    if reg.start_index > 0:
        fc.note(
            NoteCode.REGIME_CHANGE,
            f"the surroundings changed {reg.n_changes} time(s); fitted the newest "
            f"{tt.size - reg.start_index} readings only",
        )
        end = oldest_regime_end(
            tt, yy, cl.noise_sd, reg, min_points=side, inflation=cl.noise_inflation
        )
        before = Before(tt, yy, end, True) if end else None
        fc.regime_start = float(tt[reg.start_index])
        return ctx.with_readings(tt[reg.start_index :], yy[reg.start_index :], before=before)
    if not reg.cycling:
        end = short_door(tt, yy, side, inflation=cl.noise_inflation)
        if end:
            return ctx.with_readings(tt, yy, before=Before(tt, yy, end, False))
    return ctx


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


def forecast_levels(
    t: ArrayLike,
    y: ArrayLike,
    questions: Sequence[tuple[float, str | None]],
    **kwargs: Any,
) -> list[Forecast]:
    """Several questions of one series: one Forecast per ``(threshold, limit)``, each exactly
    what :func:`forecast` gives for it alone.  The steps that read the readings only (cleaning,
    the regime search, the shape test, the candidates' backtest) are done once for all of them
    (:mod:`thermeta.predictors.shared`); ``kwargs`` are :func:`forecast`'s other arguments."""
    if "threshold" in kwargs or "limit" in kwargs:
        raise ValueError("forecast_levels takes each threshold and limit in its questions")
    ta, ya = np.asarray(t, dtype=float), np.asarray(y, dtype=float)
    with shared_fits():
        return [forecast(ta, ya, thr, limit=limit, **kwargs) for thr, limit in questions]
