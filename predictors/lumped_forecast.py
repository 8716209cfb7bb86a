"""The lumped model's forecast: Newton's law with the ambient fitted or given, or measured.

    fit_lumped (predictors.lumped) -> carry k across a door that came back (predictors.carry)
    -> robust refit without what the fit calls far off -> the Forecast and its notes

With a measured ambient the load follows its air probe (predictors.measured_forecast).
"""

from __future__ import annotations

import math

import numpy as np
from thermeta.predictors.carry import carry_before
from thermeta.predictors.cleaning import residual_outliers
from thermeta.predictors.combine import combine
from thermeta.predictors.combined_forecast import (
    RICH_MIN,
    combined_forecast,
    inflation,
    note_ambient_agreement,
    self_check,
    shape_test,
    spec_of,
)
from thermeta.predictors.context import AmbientMode, Context
from thermeta.predictors.direction import (
    hold_acceleration,
    note_slowing,
    open_untested_never,
    widen_untested_early_end,
)
from thermeta.predictors.lumped import LumpedFit, fit_lumped, shrunk_eta
from thermeta.predictors.model import Model
from thermeta.predictors.outcome import NoteCode, Reason
from thermeta.predictors.prior import Prior
from thermeta.predictors.result import Forecast, never_reason
from thermeta.predictors.wording import point, step

PROFILE = "profile likelihood"


class LumpedModel(Model):
    """Newton's law of cooling, dT/dt = -k (T - Ta)."""

    name = "lumped"
    cuts_regimes = True
    uses_prior = True

    def forecast(self, ctx: Context, fc: Forecast) -> Forecast:
        fc.lag_factor_j = 1.0
        if ctx.air is not None:
            from thermeta.predictors.measured_forecast import measured_forecast

            return measured_forecast(ctx, fc)
        return lumped_forecast(ctx, fc)


def fit_kwargs(ctx: Context) -> dict:
    """fit_lumped's keyword arguments for the context (a learned prior folded in)."""
    kw = {
        "ambient": ctx.ambient,
        "ambient_sd": ctx.ambient_sd if ctx.ambient is not None else 0.0,
        "bounds": ctx.ambient_bounds(),
        "noise_sd": ctx.noise_sd,
        "limit": ctx.limit,
    }
    prior = ctx.prior
    if prior is not None:
        k_prior = prior.k_prior()
        if k_prior is not None:
            kw["k_prior"] = k_prior
        a_prior = prior.ambient_prior() if ctx.ambient is None else None
        if a_prior is not None:
            # the learned ambient is a Gaussian prior, the same penalty as a given one
            kw["ambient"], kw["ambient_sd"] = a_prior
    return kw


def lumped_forecast(ctx: Context, fc: Forecast) -> Forecast:
    """One exponential toward a fitted or given ambient, with its profile-likelihood interval."""
    fc.model = "lumped" if fc.model != "auto" else fc.model
    kw = fit_kwargs(ctx)
    tt, yy, thr = ctx.t, ctx.y, ctx.threshold
    fit = fit_lumped(tt, yy, thr, **kw)
    carried = carry_before(fc, fit, kw, ctx.before, thr) if ctx.before is not None else None
    if carried is not None:
        kw, fit, tt, yy = carried.kw, carried.fit, carried.t, carried.y
    if fit.ok:
        # robust refit: drop what the first fit calls far off (beyond the Hampel pre-filter)
        out = residual_outliers(
            fit.residuals, 4.0, floor=max(ctx.quantum, ctx.noise_sd, 1e-3 * float(np.ptp(yy)))
        )
        if 0 < out.sum() <= max(1, int(0.1 * tt.size)):
            tt, yy = tt[~out], yy[~out]
            fc.n_outliers += int(out.sum())
            fit = fit_lumped(tt, yy, thr, **kw)
    if not fit.ok:
        return fc.fail(fit.code or Reason.FIT_FAILED, fit.reason or "fit failed")
    learned = "k_prior" in kw or (ctx.ambient is None and kw.get("ambient") is not None)
    if not learned and tt.size >= RICH_MIN:
        # (after a door that came back, the carried k is the model: only a "never" is judged)
        F = shape_test(tt, yy, spec_of(kw)) if carried is None else 0.0
        # a "never" of one exponential is judged by forecast skill too: the level-off it sees
        # may be a second time constant, and a given ambient the readings contradict says the
        # one-exponential account of them is in doubt
        doubt = F > 1.0 or _contradicts(ctx, fit) or _never_against_given(ctx, fit)
        if not doubt and carried is None:
            doubt = self_check(tt, yy, kw)
        comb = None
        if doubt:
            comb = combine(tt, yy, spec_of(kw), thr, ctx.limit)
        if comb is not None and comb.weights:
            fc.params = {}
            note_given_ambient(fc, ctx)
            combined_forecast(fc, comb, fit)
            if comb.overruled:
                note_slowing(fc, ctx)
            hold_acceleration(fc, ctx)
            note_ambient_agreement(fc, ctx, fit.ambient)
            return fc
        infl = inflation(fit.residuals)
        if infl > 1.0:
            fit = fit_lumped(tt, yy, thr, **kw, inflate=infl)
            fc.note(
                NoteCode.CORRELATED_SCATTER,
                f"the readings' scatter is correlated from one reading to the next: they count "
                f"as about {tt.size / infl:.0f} independent ones, and the interval is that wide",
            )
    fill_lumped(fc, fit, ctx)
    open_untested_never(fc, ctx, fit, tt.size) or widen_untested_early_end(fc, ctx, tt.size)
    hold_acceleration(fc, ctx)
    if fc.eta_s and no_trend(tt, yy, ctx):
        # not a rate taken from the edge of the fit's own grid: the readings' own straight
        # trend, with the interval's late end open
        fc.eta_s, fc.eta_hi_s = trend_eta(tt, yy, ctx), None
        if fc.eta_s is not None and fc.eta_lo_s is not None:
            fc.eta_lo_s = min(fc.eta_lo_s, fc.eta_s)
        fc.note(
            NoteCode.NO_TREND,
            "the readings hardly move yet (their change is within their scatter and steps), so "
            "they tell no rate: the ETA follows their straight trend, the interval's early end "
            "is the earliest crossing they allow and its late end is open",
        )
    note_ambient_agreement(fc, ctx, fit.ambient)
    k_prior = kw.get("k_prior")
    if ctx.prior is not None and k_prior is not None and carried is None:
        # (carried: the older readings' fit already folded the learned prior into its k)
        a_prior = ctx.prior.ambient_prior() if ctx.ambient is None else None
        note_prior(fc, ctx.prior, k_prior, a_prior)
    return fc


def no_trend(t: np.ndarray, y: np.ndarray, ctx: Context) -> bool:
    """Whether the readings' straight trend changes them by less than twice its own standard
    error over their span (and by less than one reading step): readings that do not move."""
    if t.size < 3:
        return False
    d = t - t[0]
    slope, icpt = np.polyfit(d, y, 1)
    resid = y - (icpt + slope * d)
    sxx = float(np.sum((d - d.mean()) ** 2))
    if sxx <= 0:
        return True
    s2 = max(float(resid @ resid) / max(t.size - 2, 1), ctx.noise_sd**2, ctx.quantum**2 / 12)
    rise = abs(float(slope)) * float(d[-1])
    return rise < max(2.0 * math.sqrt(s2 / sxx) * float(d[-1]), ctx.quantum)


def trend_eta(t: np.ndarray, y: np.ndarray, ctx: Context) -> float | None:
    """Seconds until the readings' straight trend reaches the threshold (None: it does not
    head there)."""
    d = t - t[0]
    slope, icpt = np.polyfit(d, y, 1)
    if abs(slope) * d[-1] <= 1e-9 * max(1.0, float(np.max(np.abs(y)))):
        return None  # flat to rounding: no trend at all
    return shrunk_eta(float(icpt + slope * d[-1]), float(slope), 0.0, ctx.threshold, ctx.limit)


def _never_against_given(ctx: Context, fit: LumpedFit) -> bool:
    """A "never" that needs a given ambient pulled more than 1 sd toward the readings' level-off
    rests on overriding the user's value: the one-exponential account of the readings is then
    in doubt too."""
    if fit.eta_s is not None or ctx.mode != AmbientMode.KNOWN or ctx.ambient is None:
        return False
    return ctx.ambient_sd > 0 and abs(fit.ambient - ctx.ambient) > ctx.ambient_sd


def _contradicts(ctx: Context, fit: LumpedFit) -> bool:
    """Whether the fit pulls a given ambient more than 2 sd away from the given value."""
    if ctx.mode != AmbientMode.KNOWN or ctx.ambient is None or ctx.ambient_sd <= 0:
        return False
    return abs(fit.ambient - ctx.ambient) > 2.0 * ctx.ambient_sd


def fill_lumped(fc: Forecast, fit: LumpedFit, ctx: Context) -> None:
    """The Forecast's figures and notes from a lumped fit."""
    fc.k_per_s, fc.k_lo_per_s, fc.k_hi_per_s = fit.k_per_s, fit.k_lo, fit.k_hi
    fc.ambient, fc.ambient_lo, fc.ambient_hi = fit.ambient, fit.ambient_lo, fit.ambient_hi
    fc.eta_s, fc.eta_lo_s, fc.eta_hi_s = fit.eta_s, fit.eta_lo_s, fit.eta_hi_s
    fc.direction = fit.direction
    fc.rmse = fit.sigma
    fc.interval_method = PROFILE
    fc.model_weights = {"lumped": 1.0}
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
    note_given_ambient(fc, ctx)
    if (
        fc.ambient_mode == "fitted"
        and fc.ambient_lo is not None
        and fc.ambient_hi is not None
        and fc.ambient is not None
        and fc.value_now is not None
        and fc.ambient_hi - fc.ambient_lo > max(10.0, abs(fc.ambient - fc.value_now))
    ):
        fc.note(
            NoteCode.AMBIENT_POORLY_KNOWN,
            "the ambient is poorly determined by the readings so far; "
            "give it (--ambient) or measure it for a firmer forecast",
        )
    if fit.trend_now is not None:
        fc.note(
            NoteCode.TREND_OVER_LEVEL_OFF,
            "the best fit levels off short of the threshold, but the readings show no "
            "significant bend: the ETA follows their straight trend, which gets there within "
            "as long again as they have been watched; the interval spans every curve they allow",
        )
    elif fit.straight:
        fc.note(
            NoteCode.NO_BEND,
            "no significant bend in the readings yet, so the ambient and k are barely known: the "
            "ETA extrapolates the present slope (early if the curve levels off); the interval "
            "spans every curve the readings allow",
        )
    elif fit.bend_kept < 0.995:  # shown as a whole percent below 100
        fc.note(
            NoteCode.WEAK_BEND,
            f"the bend in the readings is weak: the ETA keeps {100 * fit.bend_kept:.0f} % of the "
            "fitted bend ahead (k and the ambient are poorly known); the interval spans every "
            "curve the readings allow",
        )
    note_never(fc)


def note_given_ambient(fc: Forecast, ctx: Context) -> None:
    """Say how a given ambient was taken (its doubt, a stated bound)."""
    if ctx.ambient is None or ctx.mode != AmbientMode.KNOWN:
        return
    fc.ambient_given = float(ctx.ambient)
    if ctx.ambient_sd > 0:
        fc.note(
            NoteCode.AMBIENT_UNCERTAIN,
            f"the given ambient {point(ctx.ambient)} is taken as uncertain by about "
            f"{step(ctx.ambient_sd)} (1 sd); the intervals include that",
        )


def note_never(fc: Forecast) -> None:
    """Why there is no crossing, and the earliest one the readings allow."""
    if fc.eta_s is not None:
        return
    code, text = never_reason(fc)
    fc.note(code, text)
    if fc.eta_lo_s is not None and 0 < fc.eta_lo_s < math.inf:
        fc.params["eta_earliest_s"] = fc.eta_lo_s
        fc.note(
            NoteCode.EARLIEST_CROSSING,
            "the readings do not rule a crossing out: the earliest they allow is in "
            f"{fc.eta_lo_s / 60:.0f} min (the interval's early end; its late end is open)",
        )


def note_prior(fc: Forecast, prior: Prior, k_prior, a_prior) -> None:
    """Say that a learned prior was used, and when the readings contradict it."""
    tau_h = math.exp(-k_prior[0]) / 3600.0
    text = (
        f"a prior learned from {prior.n_episodes} past episode(s) is folded in "
        f"(time constant about {tau_h:.3g} h"
    )
    if a_prior is not None:
        text += f", ambient about {point(a_prior[0], '.3g')} +- {step(a_prior[1], '.2g')}"
    fc.note(NoteCode.PRIOR_USED, text + ")")
    fc.params["prior_episodes"] = float(prior.n_episodes)
    z = (math.log(fc.k_per_s) - k_prior[0]) / k_prior[1] if fc.k_per_s else 0.0
    if abs(z) > 2.0:
        fc.note(
            NoteCode.PRIOR_CONTRADICTED,
            f"the readings disagree with the learned prior (k {math.exp(z * k_prior[1]):.2g} x "
            "the class's usual); is this a different product or setup?",
        )
