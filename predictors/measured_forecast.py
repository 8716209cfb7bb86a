"""The lumped model against a measured ambient: the load follows its air probe.

the air's regime (predictors.regime) -> the air's own curve, or its mean when a thermostat
holds it, or its present level while its trend is unclear -> the load against the air
(predictors.measured) -> the load's own regime against the air -> robust refit
"""

from __future__ import annotations

import numpy as np
from thermeta.predictors.cleaning import residual_outliers
from thermeta.predictors.context import Context
from thermeta.predictors.measured import fit_measured, measured_rss
from thermeta.predictors.measured_air import (
    FewAir,
    air_identified,
    fit_air,
    held_air,
    steady_air,
    straight_air,
)
from thermeta.predictors.outcome import NoteCode, Reason
from thermeta.predictors.regime import find_regime
from thermeta.predictors.result import Forecast, never_reason

MIN_REFIT = 4  # a refit without outliers needs readings to spare
METHOD = "parametric draws from the load and ambient fit covariances"


def measured_forecast(ctx: Context, fc: Forecast) -> Forecast:
    """The forecast of a load against its measured air (``ctx.air``)."""
    air = ctx.air
    assert air is not None  # noqa: S101 - the caller dispatches on it
    tt, yy, thr, limit = ctx.t, ctx.y, ctx.threshold, ctx.limit
    at, ay = air.t, air.y
    if at[-1] < tt[-1] - max(600.0, 3 * float(np.median(np.diff(at))) if at.size > 1 else 600.0):
        fc.note(
            NoteCode.AMBIENT_STALE,
            f"the ambient's newest reading is {(tt[-1] - at[-1]) / 60:.0f} min "
            "older than the item's; the ambient is extrapolated over the gap",
        )
    reg = find_regime(at, ay, air.noise_sd)
    if reg.start_index > 0:
        fc.note(
            NoteCode.AMBIENT_CHANGED, "the ambient changed; its forecast uses the readings since"
        )
    if reg.cycling and reg.start_index == 0:
        # a thermostat holds the air: extrapolate its mean, not a curve through one sawtooth
        a_fit = steady_air(at, ay, n_runs=reg.n_changes + 1)
        fc.note(
            NoteCode.AMBIENT_CYCLES,
            "the ambient cycles (a thermostat?); its mean is carried forward",
        )
    else:
        a_fit = fit_air(at[reg.start_index :], ay[reg.start_index :], air.noise_sd)
    spread = None
    few_air = isinstance(a_fit, FewAir)
    if not few_air and a_fit.ok and not air_identified(a_fit):
        # where the air is heading is not clear yet (a short stretch, an off-cycle): the air held
        # at its present level decides whether a crossing is forecast at all; its time is then
        # the median over the fitted trend's doubt, which the interval keeps too
        spread, a_fit = a_fit, held_air(a_fit)
        fc.note(
            NoteCode.AMBIENT_TREND_UNCLEAR,
            "the ambient's trend is not clear yet; held at its present level, "
            "and a crossing that holds then is forecast at the median of the "
            "ambient fit's spread",
        )
    fit = fit_measured(tt, yy, at, ay, thr, air_fit=a_fit, limit=limit, air_spread=spread)
    if few_air and not a_fit.straight and fit.ok and fit.eta_s is None:
        # a bend through four noisy air readings cannot rule a crossing out: the straight trend
        a_fit = straight_air(at[reg.start_index :], ay[reg.start_index :], air.noise_sd)
        fit = fit_measured(tt, yy, at, ay, thr, air_fit=a_fit, limit=limit)
    straight = few_air and a_fit.straight
    if few_air:
        fc.note(NoteCode.FEW_AMBIENT, few_air_note(int(at.size), straight))
    if not fit.ok:
        return fc.fail(fit.code or Reason.FIT_FAILED, fit.reason or "fit failed")
    if ctx.detect:
        # the air explains most changes; what it cannot (a pump started, a lid put on) shows as
        # a misfit of the load against the air: then keep only the readings since
        load_reg = find_regime(
            tt,
            yy,
            ctx.noise_sd,
            min_points=max(12, ctx.min_points),
            n_params=2,
            fit_sigma=fit.sigma,
            rss=lambda i0, i1: measured_rss(tt[i0:i1], yy[i0:i1], at, ay),
            exact=lambda i0, i1: measured_rss(tt[i0:i1], yy[i0:i1], at, ay, exact=True),
        )
        if load_reg.start_index > 0 and not load_reg.cycling:
            fc.note(
                NoteCode.LOAD_CHANGED,
                f"the load changed against its ambient {load_reg.n_changes} time(s); fitted the "
                f"newest {tt.size - load_reg.start_index} readings only",
            )
            tt, yy = tt[load_reg.start_index :], yy[load_reg.start_index :]
            fc.regime_start = float(tt[0])
            fit = fit_measured(tt, yy, at, ay, thr, air_fit=a_fit, limit=limit, air_spread=spread)
            if not fit.ok:
                return fc.fail(fit.code or Reason.FIT_FAILED, fit.reason or "fit failed")
    out = residual_outliers(
        np.asarray(fit.residuals), 4.0, floor=max(air.quantum, 1e-3 * float(np.ptp(yy)), 1e-9)
    )
    if 0 < out.sum() <= max(1, int(0.1 * tt.size)) and tt.size - out.sum() >= MIN_REFIT:
        fc.n_outliers += int(out.sum())
        fit = fit_measured(
            tt[~out], yy[~out], at, ay, thr, air_fit=a_fit, limit=limit, air_spread=spread
        )
    fc.k_per_s, fc.k_lo_per_s, fc.k_hi_per_s = fit.k_per_s, fit.k_lo, fit.k_hi
    if a_fit.ok and not straight:
        fc.ambient, fc.ambient_lo, fc.ambient_hi = a_fit.ambient, a_fit.ambient_lo, a_fit.ambient_hi
    elif not a_fit.ok:
        fc.note(
            NoteCode.AMBIENT_FIT_FAILED, f"the ambient series could not be fitted ({a_fit.reason})"
        )
    fc.eta_s, fc.eta_lo_s, fc.eta_hi_s = fit.eta_s, fit.eta_lo_s, fit.eta_hi_s
    fc.direction = fit.direction
    fc.rmse = fit.sigma
    fc.interval_method = METHOD
    fc.model_weights = {"lumped": 1.0}
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
        fc.note(
            NoteCode.AMBIENT_MEASURED,
            "ambient measured; its asymptote is fitted from the ambient readings",
        )
    if fc.eta_s is None:
        fc.note(*never_reason(fc))
    return fc


def few_air_note(n_air: int, straight: bool) -> str:
    if straight:
        return (
            f"only {n_air} ambient readings: the ambient's straight trend is extrapolated (it "
            "may level off sooner, so the crossing is early and the interval's late end open)"
        )
    return (
        f"only {n_air} ambient readings: the ambient's curve through them is extrapolated, "
        "their scatter assumed; the interval is wide for that"
    )
