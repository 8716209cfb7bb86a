"""The curves a picture of a forecast draws, rebuilt from the forecast: the fitted and forecast
curve (:func:`model_curve`) and its 90 % band (:func:`band`).

The band: the forecast curve stretched in time about the newest reading so that it meets the
threshold exactly at the ends of the forecast's 90 % crossing interval (eta_lo_s, eta_hi_s),
T_band(t) = T(t_last + (t - t_last) * eta / eta_bound); where the interval has no upper end the
band reaches the value now (it may never get there).  It is the crossing interval drawn as a
region, consistent with the numbers printed beside it.
"""

from __future__ import annotations

import math
from typing import Any, Protocol

import numpy as np
from thermeta.predictors.result import Forecast


class SeriesLike(Protocol):
    t: np.ndarray
    y: np.ndarray


def _air_curve(p: dict[str, float], t_last: float, amb_t, amb_y):
    """The ambient over time: the measured series up to its end, its own fit beyond."""

    def air(t: np.ndarray) -> np.ndarray:
        t = np.asarray(t, float)
        future = p["air_ambient"] + (p["air_value_now"] - p["air_ambient"]) * np.exp(
            -p["air_k_per_s"] * np.clip(t - t_last, 0.0, None)
        )
        if amb_t is None or len(amb_t) == 0:
            return future
        from thermeta.predictors.cleaning import clean

        cl = clean(np.asarray(amb_t, float), np.asarray(amb_y, float))  # as the forecast did
        at, ay = cl.t, cl.y
        past = np.interp(t, at, ay)
        return np.where(t <= at[-1], past, future)

    return air


def model_curve(fc: Forecast, t: np.ndarray, series: Any = None) -> np.ndarray | None:
    """The fitted and forecast curve of ``fc`` at epoch times ``t`` (None if it cannot be drawn).

    Uses the predictors' own ``predict`` when available; otherwise rebuilds the curve from
    ``fc.params`` (see the board note of the forecast core for the keys).
    """
    t = np.asarray(t, float)
    mine = _rebuilt_curve(fc, t, series)
    try:
        from thermeta.predictors import predict
    except ImportError:
        return mine
    try:
        theirs = np.asarray(predict(fc, t), float)
    except (TypeError, ValueError, KeyError):
        return mine
    if theirs.shape != t.shape:
        return mine
    if mine is None:
        return theirs if np.isfinite(theirs).any() else None
    # the predictors' own values where they give one (NaN where the curve needs the fit object)
    return np.where(np.isfinite(theirs), theirs, mine)


def _rebuilt_curve(fc: Forecast, t: np.ndarray, series: Any) -> np.ndarray | None:
    """The curve rebuilt from ``fc.params`` (and the series, for a measured ambient)."""
    p = fc.params or {}
    if not fc.ok:
        return None
    if "amplitude" in p:
        # T(t) = Ta + A e^(-k (t - t_first))
        return p["ambient"] + p["amplitude"] * np.exp(-p["k_per_s"] * (t - p["t_first"]))
    if "T0" in p and "air_ambient" in p and fc.t_last is not None:
        # dT/dt = -k (T - Ta(t)), stepped exactly on a fine grid from the fitted start T0
        air = _air_curve(
            p, fc.t_last, getattr(series, "ambient_t", None), getattr(series, "ambient_y", None)
        )
        k = p["k_per_s"]
        t0 = p["t_first"]
        grid = np.linspace(t0, max(float(t.max()), t0 + 1.0), 2000)
        h = grid[1] - grid[0]
        ta = air(grid[:-1] + 0.5 * h)
        decay = math.exp(-k * h)
        T = np.empty(grid.size)
        T[0] = p["T0"]
        for i in range(grid.size - 1):
            # T_{i+1} = Ta + (T_i - Ta) e^(-k h), Ta held at the step's midpoint value
            T[i + 1] = ta[i] + (T[i] - ta[i]) * decay
        return np.interp(t, grid, T, left=np.nan)
    if "biot" in p and fc.model in ("slab", "cylinder", "sphere"):
        return _conduction_curve(fc, t, series)
    if fc.k_per_s and fc.ambient is not None and fc.value_now is not None and fc.t_last is not None:
        return fc.ambient + (fc.value_now - fc.ambient) * np.exp(-fc.k_per_s * (t - fc.t_last))
    return None


def _conduction_curve(fc: Forecast, t: np.ndarray, series: Any) -> np.ndarray | None:
    amb_t, amb_y = getattr(series, "ambient_t", None), getattr(series, "ambient_y", None)
    if fc.ambient_mode != "measured" or amb_t is None:
        from thermeta.predictors.conduction_series import theta_centre

        if fc.ambient is None:
            return None
        # T = Ta + (Ti - Ta) theta_centre(a (t - t0), Bi), constant ambient
        fo = np.clip(fc.params["a_per_s"] * (t - fc.params["t0_s"]), 0.0, None)
        return fc.ambient + (fc.params["Ti"] - fc.ambient) * theta_centre(
            fo, fc.params["biot"], fc.model
        )
    # A measured ambient enters through a superposition over its history: refit the same cleaned
    # readings with the conduction model (what the forecast did) to get its curve.
    from thermeta.predictors.cleaning import clean
    from thermeta.predictors.conduction import fit_conduction

    cl = clean(np.asarray(series.t, float), np.asarray(series.y, float))
    air = clean(np.asarray(amb_t, float), np.asarray(amb_y, float))
    sel = cl.t >= (fc.regime_start if fc.regime_start is not None else -np.inf)
    fit = fit_conduction(cl.t[sel], cl.y[sel], fc.model, ambient_t=air.t, ambient_y=air.y)
    if not fit.ok:
        return None
    return fit.predict(t)


def band(fc: Forecast, t_fc: np.ndarray, series: Any) -> tuple[np.ndarray, np.ndarray] | None:
    """Forecast curve stretched in time so it meets the threshold at eta_lo_s and eta_hi_s."""
    if not fc.eta_s or fc.eta_s <= 0 or fc.t_last is None or fc.eta_lo_s is None:
        return None
    t_last = fc.t_last

    eta_s = fc.eta_s

    def stretched(bound_s: float | None) -> np.ndarray | None:
        if bound_s is None:  # unbounded: it may stay where it is
            now = model_curve(fc, np.array([t_last]), series)
            return None if now is None else np.full(t_fc.shape, float(now[0]))
        if bound_s <= 0:
            return None
        return model_curve(fc, t_last + (t_fc - t_last) * eta_s / bound_s, series)

    fast = stretched(max(fc.eta_lo_s, 1e-6))
    slow = stretched(fc.eta_hi_s)
    if fast is None or slow is None:
        return None
    return np.minimum(fast, slow), np.maximum(fast, slow)
