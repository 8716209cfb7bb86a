"""The fitted curve of a Forecast at any times, for plots and dashboards."""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike
from thermeta.predictors.measured import load_after
from thermeta.predictors.result import Forecast


def predict(fc: Forecast, t: ArrayLike) -> np.ndarray:
    """Model values at epoch seconds ``t`` from ``fc.params``; NaN where the model cannot say.

    lumped (fitted/known): T(t) = Ta + b e^(-k (t - t_first)) (ahead of the newest reading with
    the bend the point ETA keeps, see ``k_ahead_per_s``); measured: from the newest reading
    on, T(x) with the air extrapolated by its own fit (before it, NaN: that part depends on the
    measured air).  Core models: their own fit's curve.
    """
    tt = np.asarray(t, dtype=float)
    p = fc.params or {}
    if not fc.ok:
        return np.full(tt.shape, np.nan)
    if fc.model_fit is not None and hasattr(fc.model_fit, "predict"):
        return np.asarray(fc.model_fit.predict(tt), dtype=float)
    if "amplitude" in p:
        k = p["k_per_s"]
        v = p["ambient"] + p["amplitude"] * np.exp(-k * (tt - p["t_first"]))
        if "k_ahead_per_s" in p:
            # ahead of the newest reading, the curve the point ETA uses: the fit's present value
            # and slope with its bend shrunk (lumped.bend_weight); the tangent when k_ahead = 0
            # (or, over a fitted level-off, the readings' straight trend: ahead_value/_slope)
            x = tt - p["ahead_from_t"]
            slope = -k * p["amplitude"] * np.exp(-k * (p["ahead_from_t"] - p["t_first"]))
            slope = p.get("ahead_slope_per_s", slope)
            kw = p["k_ahead_per_s"]
            rise = slope * x if kw <= 0 else slope / kw * -np.expm1(-kw * np.maximum(x, 0.0))
            v = np.where(x > 0, p.get("ahead_value", p["value_fit_now"]) + rise, v)
        return v
    if "air_ambient" in p and fc.t_last is not None:
        x = tt - fc.t_last
        v = load_after(
            np.maximum(x, 0.0),
            p["value_fit_now"],
            p["k_per_s"],
            p["air_value_now"],
            p["air_ambient"],
            p["air_k_per_s"],
        )
        return np.where(x >= 0, v, np.nan)
    return np.full(tt.shape, np.nan)
