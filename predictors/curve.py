"""The fitted curve of a Forecast at any times, for plots and dashboards."""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike
from thermeta.predictors.measured import load_after
from thermeta.predictors.result import Forecast


def predict(fc: Forecast, t: ArrayLike) -> np.ndarray:
    """Model values at epoch seconds ``t`` from ``fc.params``; NaN where the model cannot say.

    lumped (fitted/known): T(t) = Ta + b e^(-k (t - t_first)); measured: from the newest reading
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
        return p["ambient"] + p["amplitude"] * np.exp(-p["k_per_s"] * (tt - p["t_first"]))
    if "air_ambient" in p and fc.t_last is not None:
        x = tt - fc.t_last
        v = load_after(np.maximum(x, 0.0), p["value_fit_now"], p["k_per_s"], p["air_value_now"],
                       p["air_ambient"], p["air_k_per_s"])
        return np.where(x >= 0, v, np.nan)
    return np.full(tt.shape, np.nan)
