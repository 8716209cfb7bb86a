"""The core-probe models' forecast (slab, cylinder, sphere) and ``auto``, which picks a shape.

A probe at the centre of a thick product lags: its readings follow the conduction series
(predictors.conduction), fitted with the episode start at the window's earliest reading.
``auto`` fits the lumped curve and the three core shapes and keeps the lumped one unless a shape
has a clearly lower AICc.
"""

from __future__ import annotations

import copy
import importlib
import math

from thermeta.predictors.combined_forecast import note_ambient_agreement
from thermeta.predictors.context import Context
from thermeta.predictors.lumped import fit_lumped
from thermeta.predictors.lumped_forecast import LumpedModel, fit_kwargs, note_given_ambient
from thermeta.predictors.model import Model
from thermeta.predictors.outcome import NoteCode, Reason
from thermeta.predictors.result import Forecast

AUTO_MARGIN = 2.0  # AICc points a core model must gain over the lumped one (a common rule of thumb)


def aicc(rss: float, n: int, p: int) -> float:
    """AICc = n ln(RSS/n) + 2p + 2p(p+1)/(n-p-1)."""
    if n - p - 1 <= 0 or rss <= 0:
        return math.inf
    return n * math.log(rss / n) + 2 * p + 2 * p * (p + 1) / (n - p - 1)


def conduction_kwargs(ctx: Context) -> dict:
    """How fit_conduction is told the ambient (a measured series, a given value, or nothing),
    the episode start and the fewest readings to fit."""
    kw: dict = {} if ctx.start_s is None else {"start_s": float(ctx.start_s)}
    kw["min_points"] = int(ctx.min_points)
    if ctx.air is not None:
        return {**kw, "ambient_t": ctx.air.t, "ambient_y": ctx.air.y}
    if ctx.ambient is not None:
        kw.update(ambient=float(ctx.ambient), ambient_sd=float(ctx.ambient_sd))
        if ctx.ambient_within is not None:
            kw["ambient_within"] = float(ctx.ambient_within)
    return kw


def _conduction_module():
    try:
        return importlib.import_module("thermeta.predictors.conduction")
    except ImportError:
        return None


class ConductionModel(Model):
    """A probe at the centre of a slab, long cylinder or sphere with surface convection."""

    def __init__(self, geometry: str) -> None:
        self.name = geometry

    def forecast(self, ctx: Context, fc: Forecast, fit=None) -> Forecast:
        """A core-probe forecast; ``fit`` is an already fitted curve of this shape (from auto)."""
        if fit is None:
            conduction = _conduction_module()
            if conduction is None:
                return fc.fail(Reason.MODEL_UNAVAILABLE, "conduction model not available")
            fit = conduction.fit_conduction(ctx.t, ctx.y, self.name, **conduction_kwargs(ctx))
        fc.model_fit = fit
        fc.model = self.name
        if not fit.ok:
            code = Reason.TOO_FEW_READINGS if fit.n_points < ctx.min_points else Reason.FIT_FAILED
            return fc.fail(code, fit.reason or "fit failed")
        eta, lo, hi = fit.time_to_threshold(ctx.threshold, t_now=float(ctx.t[-1]))
        if eta == 0.0 and _on_near_side(ctx, fit.value_at_last):
            # "past" there means the curve heads (by a hair, when flat) away from a threshold it
            # is still short of; with the limit's side given that is no crossing, not one passed
            eta = lo = hi = None
        fc.eta_s, fc.eta_lo_s, fc.eta_hi_s = eta, lo, hi
        fc.k_per_s = fit.k_per_s
        fc.k_lo_per_s = getattr(fit, "k_lo_per_s", None)
        fc.k_hi_per_s = getattr(fit, "k_hi_per_s", None)
        fc.ambient, fc.ambient_lo, fc.ambient_hi = fit.Ta, fit.ambient_lo, fit.ambient_hi
        for text in getattr(fit, "warnings", []) or []:
            fc.note(NoteCode.MODEL_NOTE, text)
        fc.biot, fc.lag_factor_j = fit.biot, fit.lag_factor_j
        fc.rmse = fit.rmse
        fc.interval_method = fit.interval_method
        fc.model_weights = {self.name: 1.0}
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
        note_given_ambient(fc, ctx)
        note_ambient_agreement(fc, ctx, fit.Ta)
        return fc


class AutoModel(Model):
    """The lumped model, unless the best core-probe shape has a clearly lower AICc.

    All three shapes have the same parameters (Ti, [Ta,] Bi, a), so among them the lowest AICc
    is the lowest residual sum: the best shape is kept however small its lead over the other
    two (:func:`conduction.select_geometry`).  Only against the lumped curve, the simpler
    family, must it win by AUTO_MARGIN; a Newton curve is then kept on a tie.  Only the chosen
    shape's crossing interval is computed (the profile refits are most of the cost).
    """

    name = "auto"
    uses_prior = True

    def forecast(self, ctx: Context, fc: Forecast) -> Forecast:
        base = copy.deepcopy(fc)
        lumped = LumpedModel().forecast(ctx, copy.deepcopy(fc))
        if lumped.model == "auto":
            lumped.model = "lumped"
        if not lumped.ok:
            return lumped
        # the shapes are compared by fit: one exponential's own (the lumped forecast may be a
        # combination of curves chosen by their forecasts)
        if ctx.air is None:
            one = fit_lumped(ctx.t, ctx.y, ctx.threshold, intervals=False, **fit_kwargs(ctx))
            lumped_ic = aicc(one.rss, one.n, one.n_par) if one.ok else math.inf
        elif "rss" in lumped.params:
            p = lumped.params
            lumped_ic = aicc(p["rss"], int(p["n_fit"]), int(p["n_params"]))
        else:
            return lumped
        conduction = _conduction_module()
        if conduction is None:
            return lumped
        fit, scores = conduction.select_geometry(ctx.t, ctx.y, **conduction_kwargs(ctx))
        best, shape = lumped, "lumped"
        if fit.ok and fit.aicc < lumped_ic - AUTO_MARGIN:
            core = ConductionModel(fit.geometry).forecast(ctx, copy.deepcopy(base), fit=fit)
            if core.ok:
                best, shape = core, fit.geometry
        scores["lumped"] = lumped_ic
        ref = scores[shape]
        others = ", ".join(
            f"{m} {v - ref:+.1f}" for m, v in scores.items() if m != shape and math.isfinite(v)
        )
        best.note(
            NoteCode.MODEL_CHOICE,
            f"model chosen by AICc: {shape}" + (f" (others: {others})" if others else ""),
        )
        if shape != "lumped":
            best.model_basis = "AICc"
        return best


def _on_near_side(ctx: Context, value_now: float) -> bool:
    """The fitted value now is short of the threshold on the side the limit names."""
    if ctx.limit == "upper":
        return value_now < ctx.threshold
    if ctx.limit == "lower":
        return value_now > ctx.threshold
    return False
