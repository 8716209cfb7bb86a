"""Top-level forecast: clean the readings, find the current regime, fit, and predict the crossing.

PROVISIONAL: a plain lumped fit so the rest of the service can be built against the contract.
The forecast-core work replaces the internals; the signature and the Forecast fields stay.
"""

from __future__ import annotations

import math

import numpy as np
from numpy.typing import ArrayLike
from scipy.optimize import curve_fit

from thermeta.predictors.result import Forecast

MODELS = ("lumped", "slab", "cylinder", "sphere", "auto")


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
    min_points: int = 8,
) -> Forecast:
    """Forecast when the series ``y(t)`` crosses ``threshold``.

    t: epoch seconds (any order, duplicates allowed); y: temperatures in one unit.
    ambient: a known constant ambient (known mode); ambient_t/ambient_y: an ambient probe series
    (measured mode); neither: the ambient is fitted.  window_s caps the history used.
    """
    if model not in MODELS:
        raise ValueError(f"model must be one of {', '.join(MODELS)}, got {model!r}")
    mode = "measured" if ambient_y is not None else ("known" if ambient is not None else "fitted")
    ta = np.asarray(t, dtype=float)
    ya = np.asarray(y, dtype=float)
    if ta.shape != ya.shape:
        raise ValueError("t and y must have the same length")
    keep = np.isfinite(ta) & np.isfinite(ya)
    ta, ya = ta[keep], ya[keep]
    order = np.argsort(ta, kind="stable")
    ta, ya = ta[order], ya[order]
    ta, idx = np.unique(ta, return_index=True)
    ya = ya[idx]
    if window_s is not None and ta.size:
        sel = ta >= ta[-1] - window_s
        ta, ya = ta[sel], ya[sel]
    fc = Forecast(threshold=float(threshold), model=model, ambient_mode=mode, n_points=int(ta.size))
    if ta.size == 0:
        fc.ok, fc.reason = False, "no readings"
        return fc
    fc.t_last, fc.value_now = float(ta[-1]), float(ya[-1])
    fc.regime_start = float(ta[0])
    if ta.size < min_points:
        fc.ok, fc.reason = False, f"too few readings to fit ({ta.size} < {min_points})"
        return fc
    x = ta - ta[-1]
    if mode == "measured":
        ta_amb = float(np.median(np.asarray(ambient_y, dtype=float)[-20:]))
    else:
        ta_amb = ambient

    def f(x, t_now, k, amb):
        return amb + (t_now - amb) * np.exp(-k * x)

    span = max(x[-1] - x[0], 1.0)
    try:
        if ta_amb is None:
            p0 = [ya[-1], 1.0 / span, ya[-1] + 2 * (ya[-1] - ya[0])]
            popt, _ = curve_fit(f, x, ya, p0=p0, bounds=([-np.inf, 1e-9, -100], [np.inf, 1.0, 200]))
            t_now, k, amb = popt
        else:
            popt, _ = curve_fit(lambda x, a, k: f(x, a, k, ta_amb), x, ya, p0=[ya[-1], 1.0 / span],
                                bounds=([-np.inf, 1e-9], [np.inf, 1.0]))
            (t_now, k), amb = popt, ta_amb
    except (RuntimeError, ValueError) as exc:
        fc.ok, fc.reason = False, f"fit failed: {exc}"
        return fc
    fc.k_per_s, fc.ambient = float(k), float(amb)
    fc.direction = "rising" if amb > t_now else "falling"
    fc.lag_factor_j = 1.0
    # T(x) = Ta + (T_now - Ta) e^(-k x) = thr  =>  x = -ln((thr - Ta)/(T_now - Ta)) / k
    ratio = (threshold - amb) / (t_now - amb) if t_now != amb else math.nan
    if (fc.direction == "rising" and fc.value_now >= threshold) or (
        fc.direction == "falling" and fc.value_now <= threshold
    ):
        fc.eta_s = 0.0
    elif 0 < ratio < 1:
        fc.eta_s = max(0.0, -math.log(ratio) / k)
    fc.interval_method = None
    return fc
