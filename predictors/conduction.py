"""Core-probe model: a probe at the centre of a slab, long cylinder or sphere, surface convection.

    T(t) = Ta + (Ti - Ta) theta_centre(Fo, Bi),   Fo = a (t - t0),   a = alpha / L^2  [1/s]

(theta_centre in :mod:`conduction_series`; a measured, time-varying ambient by Duhamel
superposition in :mod:`conduction_ambient`).  Fitted: Ti (uniform initial temperature), Ta (fitted
mode), Bi, a and, optionally, the episode start t0.  Reported: the late-time rate k = zeta_1^2 a and
the centre's lag factor j = C_1; for small Bi the model is the lumped exponential, k = m Bi a.

The fit is separable: for given (Bi, a[, t0]) the curve is linear in Ti and Ta, so a coarse grid
over (log Bi, log a) with linear solves gives a safe start, least squares on the projected residual
(variable projection) polishes it, and the covariance s^2 (J'J)^-1 comes from the full Jacobian.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy.optimize import least_squares
from thermeta.predictors import conduction_eta as ceta
from thermeta.predictors.conduction_ambient import (
    AmbientFn,
    make_ambient_fn,
    steady_level,
)
from thermeta.predictors.conduction_curve import Curve as _Curve
from thermeta.predictors.conduction_curve import covariance, projected, start_grid
from thermeta.predictors.conduction_profile import profile_interval
from thermeta.predictors.conduction_series import (
    BIOT_MAX,
    BIOT_MIN,
    GEOMETRIES,
    SHAPE_FACTOR,
    first_term,
)
from thermeta.predictors.wording import point, step

Float = NDArray[np.float64]

FIT_BIOT_MIN = 1e-3
FIT_BIOT_MAX = 100.0
AMBIENT_BOUNDS = (-100.0, 300.0)
N_DRAWS = 400
MIN_DOF = 2  # degrees of freedom left for the noise by the fewest readings fitted by default
PROFILE_METHOD = (
    "profile likelihood: refits constrained to cross at each trial time, "
    "(n - p) (RSS/RSS_min - 1) <= F(1, n - p; 0.90)"
)
INTERVAL_METHOD = (
    "delta method by simulation: draws from the fit's sampling distribution (multivariate t, "
    "scale s^2 (J'J)^-1) pushed through the exact crossing time"
)

__all__ = [
    "GEOMETRIES",
    "INTERVAL_METHOD",
    "SHAPE_FACTOR",
    "ConductionFit",
    "aicc",
    "fit_conduction",
    "select_geometry",
]


def aicc(rss: float, n: int, n_params: int) -> float:
    """AICc = n ln(RSS/n) + 2p + 2p(p+1)/(n-p-1)  (Gaussian errors, p model parameters)."""
    if n - n_params - 1 <= 0 or rss <= 0:
        return math.inf
    p = n_params
    return n * math.log(rss / n) + 2 * p + 2 * p * (p + 1) / (n - p - 1)


@dataclass
class ConductionFit:
    """A fitted core-probe curve.  Times absolute epoch seconds; temperatures in the data's unit.

    ``Ta`` is the fitted or known constant ambient, or in measured mode the ambient at the newest
    reading.  Interval ends are None where unknown or unbounded.
    """

    geometry: str
    ambient_mode: str
    ok: bool = True
    reason: str | None = None
    n_points: int = 0
    t_last: float = math.nan
    t0_s: float = math.nan
    Ti: float = math.nan
    Ta: float = math.nan
    biot: float = math.nan
    a_per_s: float = math.nan
    k_per_s: float = math.nan
    lag_factor_j: float = math.nan
    param_names: tuple[str, ...] = ()
    params: Float = field(default_factory=lambda: np.zeros(0))
    cov: Float | None = None
    rss: float = math.nan
    rmse: float = math.nan
    n_params: int = 0
    aicc: float = math.inf
    biot_lo: float | None = None
    biot_hi: float | None = None
    k_lo_per_s: float | None = None
    k_hi_per_s: float | None = None
    ambient_lo: float | None = None
    ambient_hi: float | None = None
    value_at_last: float = math.nan
    interval_method: str = INTERVAL_METHOD
    interval_kind: str = "draws"
    ambient_note: str | None = None
    warnings: list[str] = field(default_factory=list)
    _curve: _Curve | None = field(default=None, repr=False)
    _draws: Float | None = field(default=None, repr=False)
    _data: tuple[Float, Float] | None = field(default=None, repr=False)
    _bounds: tuple[list[float], list[float]] | None = field(default=None, repr=False)

    def predict(self, t_abs: ArrayLike) -> Float:
        """Fitted centre temperature at absolute times (also beyond the data)."""
        if not self.ok or self._curve is None:
            raise ValueError(f"no fitted curve: {self.reason}")
        return self._curve.full(self.params, np.atleast_1d(np.asarray(t_abs, dtype=float)))

    @property
    def direction(self) -> str:
        return "rising" if self.Ta > self.Ti else "falling"

    def summary(self) -> dict[str, Any]:
        """The fitted figures as plain floats (for logs and Forecast.params)."""
        return {
            "geometry": self.geometry,
            "biot": self.biot,
            "a_per_s": self.a_per_s,
            "Ti": self.Ti,
            "Ta": self.Ta,
            "t0": self.t0_s,
            "k_per_s": self.k_per_s,
            "lag_factor_j": self.lag_factor_j,
            "rmse": self.rmse,
            "aicc": self.aicc,
        }

    def time_to_threshold(
        self, threshold: float, t_now: float | None = None
    ) -> tuple[float | None, float | None, float | None]:
        """(eta_s, lo_s, hi_s), seconds from ``t_now`` (default: the newest reading).

        eta None: the fitted curve never reaches the threshold; 0: the fitted curve is already
        past it.  (lo, hi): the 90 % interval; hi None when over 5 % of plausible curves never
        cross.
        """
        if not self.ok or self._curve is None:
            return None, None, None
        t_now = self.t_last if t_now is None else float(t_now)
        eta = float(ceta.etas(self._curve, self.params, threshold, t_now, self._curve.span_s)[0])
        if eta == 0.0:
            return 0.0, 0.0, 0.0
        lo = hi = None
        if self.interval_kind == "profile" and self._data is not None:
            try:
                with np.errstate(all="ignore"):
                    lo, hi = profile_interval(
                        self, *self._data, threshold, t_now, eta, *self._bounds
                    )  # type: ignore[misc]
                lo = None if lo is None else min(lo, eta)
                hi = None if hi is None else max(hi, eta)
                return (eta if math.isfinite(eta) else None), lo, hi
            except (ArithmeticError, ValueError, np.linalg.LinAlgError) as exc:
                self.warnings.append(f"profile interval failed ({exc}); used draws")
                self.interval_method = INTERVAL_METHOD
        if self._draws is not None:
            draws = self._draws
            if self._curve.mode == "measured":
                draws = draws[: ceta.N_MEASURED_DRAWS]
            try:
                with np.errstate(all="ignore"):
                    lo, hi = ceta.quantiles_90(
                        ceta.etas(self._curve, draws, threshold, t_now, self._curve.span_s)
                    )
            except (ArithmeticError, ValueError, np.linalg.LinAlgError) as exc:
                # No interval is a result too; the point forecast stands.
                self.warnings.append(f"no interval for the crossing time: {exc}")
        if not math.isfinite(eta):
            return None, lo, None
        lo = None if lo is None else min(lo, eta)
        hi = None if hi is None else max(hi, eta)
        return eta, lo, hi


def _failed(geometry: str, mode: str, n: int, reason: str) -> ConductionFit:
    return ConductionFit(geometry=geometry, ambient_mode=mode, ok=False, reason=reason, n_points=n)


def fit_conduction(
    t_s: ArrayLike,
    y: ArrayLike,
    geometry: str,
    *,
    ambient: float | None = None,
    ambient_t: ArrayLike | None = None,
    ambient_y: ArrayLike | None = None,
    ambient_future: AmbientFn | None = None,
    start_s: float | None = None,
    fit_start: bool = False,
    ambient_bounds: tuple[float, float] = AMBIENT_BOUNDS,
    ambient_sd: float = 0.0,
    interval: str = "auto",
    min_points: int | None = None,
    hold_steady: bool = True,
    ambient_within: float | None = None,
) -> ConductionFit:
    """Fit the centre-probe curve to cleaned readings ``y`` at epoch seconds ``t_s``.

    ambient: a known constant; ambient_t/ambient_y: a measured series (ambient_future, a callable
    of absolute times, extends it past its last reading; default an exponential-approach fit of
    the series); neither: fitted.  start_s: the episode start when the body was uniform (default
    the first reading); fit_start also fits an offset to it.  ambient_sd > 0 (known mode) says
    the given ambient is only known to that sd: the ambient is then fitted with a Gaussian prior
    centred on it, so the intervals carry that doubt; ambient_within, a stated bound on how far
    off it may be: beyond it the ambient is held at the bound.  interval: "profile" (profile
    likelihood of the crossing time; slower, better coverage), "draws" (simulated delta method,
    also used for the Bi, k and ambient intervals) or "auto" (the profile, with a measured, drifting
    ambient too: there the draws covered the true crossing in only 60-83 % of
    scripts/bench_conduction.py's warm cases, the profile in 93-100 %, for about 4x the CPU
    time, 0.23-0.27 s instead of 0.055 s per fit and interval when measured).  hold_steady: a
    measured ambient with no significant trend over the episode (:func:`steady_level`) is taken
    as a constant at its mean (ambient_mode stays "measured").  min_points: the fewest readings
    to fit (default: the free parameters plus two, so the noise has two degrees of freedom: 5
    with a given or measured ambient, 6 with it fitted, one more with fit_start; the intervals'
    t and F(1, n - p) cut-offs widen as it nears that).  A failed fit is returned with
    ``ok=False`` and a reason; ValueError only for a bad geometry or mismatched arrays.
    """
    if geometry not in GEOMETRIES:
        raise ValueError(f"geometry must be one of {', '.join(GEOMETRIES)}, got {geometry!r}")
    if interval not in ("profile", "draws", "auto"):
        raise ValueError(f"interval must be 'profile', 'draws' or 'auto', got {interval!r}")
    t = np.asarray(t_s, dtype=float)
    yy = np.asarray(y, dtype=float)
    if t.shape != yy.shape or t.ndim != 1:
        raise ValueError("t_s and y must be 1-D arrays of the same length")
    mode = "measured" if ambient_y is not None else ("known" if ambient is not None else "fitted")
    keep = np.isfinite(t) & np.isfinite(yy)
    order = np.argsort(t[keep], kind="stable")
    t, yy = t[keep][order], yy[keep][order]
    n = int(t.size)
    if min_points is None:
        min_points = 3 + (mode == "fitted") + fit_start + MIN_DOF
    if n < min_points:
        return _failed(geometry, mode, n, f"too few readings to fit ({n} < {min_points})")
    start = float(t[0]) if start_s is None else float(start_s)
    span = float(t[-1] - start)
    if span <= 0.0:
        return _failed(geometry, mode, n, "the readings span no time after the episode start")
    amb_fn, note = None, None
    if mode == "measured":
        if ambient_t is None:
            raise ValueError("ambient_y needs ambient_t")
        try:
            amb_fn, note = make_ambient_fn(
                np.asarray(ambient_t, float), np.asarray(ambient_y, float), ambient_future
            )
        except ValueError as exc:
            return _failed(geometry, mode, n, str(exc))
        level = (
            _steady_ambient(
                np.asarray(ambient_t, float), np.asarray(ambient_y, float), start, float(t[-1])
            )
            if hold_steady and ambient_future is None
            else None
        )
        if level is not None:
            # No trend in the air: the constant-ambient model at its mean (the mean's standard
            # error as the sd of a soft prior), instead of a Duhamel sum over its noise and an
            # extrapolated curve whose asymptote wanders with that noise.
            fit = fit_conduction(
                t,
                yy,
                geometry,
                ambient=level[0],
                start_s=start,
                fit_start=fit_start,
                ambient_sd=level[1],
                interval=interval,
                min_points=min_points,
            )
            fit.ambient_mode = "measured"
            fit.ambient_note = (
                f"the ambient shows no trend; carried forward at its mean "
                f"{point(level[0], '.4g')} (standard error "
                f"{step(level[1], '.2g')})"
            )
            if fit.ok:
                fit.warnings.append(fit.ambient_note)
            return fit
    curve = _Curve(geometry, mode, start, span, ambient, amb_fn, fit_start)
    fit = _fit_curve(curve, t, yy)
    if fit.ok and mode == "fitted" and not ambient_bounds[0] <= fit.Ta <= ambient_bounds[1]:
        # Too little curvature to place the ambient: hold it at the nearest plausible bound.
        ta = min(max(fit.Ta, ambient_bounds[0]), ambient_bounds[1])
        curve = _Curve(geometry, "known", start, span, ta, None, fit_start)
        fit = _fit_curve(curve, t, yy)
        fit.ambient_mode = "fitted"
        fit.warnings.append(f"ambient not identifiable from the curvature; held at {point(ta)}")
    if fit.ok and mode == "known" and ambient is not None and ambient_sd > 0.0:
        # Weight the prior row by noise sd / ambient sd (noise sd from the exact-ambient fit).
        w = max(fit.rmse, 1e-9) / ambient_sd
        curve = _Curve(
            geometry, "fitted", start, span, None, None, fit_start, prior=(float(ambient), w)
        )  # type: ignore[arg-type]
        soft = _fit_curve(curve, t, yy)
        if soft.ok and ambient_within is not None and abs(soft.Ta - ambient) > ambient_within:
            # a stated bound holds: the ambient at the bound's nearer edge
            edge = float(ambient) + math.copysign(ambient_within, soft.Ta - float(ambient))
            held = _fit_curve(_Curve(geometry, "known", start, span, edge, None, fit_start), t, yy)
            if held.ok:
                held.warnings.append(
                    f"the readings pull the ambient beyond the stated bound; held at {point(edge)}"
                )
                soft = held
        if soft.ok:
            soft.ambient_mode = "known"
            fit = soft
    fit.ambient_note = note
    if interval in ("profile", "auto"):
        fit.interval_kind, fit.interval_method = "profile", PROFILE_METHOD
    return fit


def _steady_ambient(
    at: Float, ay: Float, start_s: float, end_s: float
) -> tuple[float, float] | None:
    """steady_level of the air readings over the episode [start_s, end_s] (all of them when
    fewer than 6 fall inside)."""
    keep = np.isfinite(at) & np.isfinite(ay)
    at, ay = at[keep], ay[keep]
    order = np.argsort(at, kind="stable")
    at, ay = at[order], ay[order]
    inside = (at >= start_s) & (at <= end_s)
    if int(inside.sum()) >= 6:
        at, ay = at[inside], ay[inside]
    return steady_level(at, ay)


def _fit_curve(curve: _Curve, t: Float, y: Float) -> ConductionFit:
    """The fit, with any numerical failure turned into a failed result (never raised)."""
    try:
        with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
            return _fit_curve_raw(curve, t, y)
    except (ArithmeticError, ValueError, np.linalg.LinAlgError) as exc:
        return _failed(curve.geometry, curve.mode, int(t.size), f"fit failed: {exc}")


def _fit_curve_raw(curve: _Curve, t: Float, y: Float) -> ConductionFit:
    n = int(t.size)
    span = curve.span_s
    lo = [math.log(FIT_BIOT_MIN), math.log(1e-4 / span)]
    hi = [math.log(FIT_BIOT_MAX), math.log(1e4 / span)]
    scale = [1.0, 1.0]
    if curve.fit_start:
        lo.append(-2.0)
        hi.append(float(t[0] - curve.start_s) / span + 0.5)
        scale.append(0.05)
    try:
        q0 = np.clip(start_grid(curve, t, y), lo, hi)
        sol = least_squares(
            lambda q: projected(curve, q, t, y)[0],
            q0,
            bounds=(lo, hi),
            x_scale=np.array(scale),
            method="trf",
            xtol=1e-10,
            ftol=1e-10,
        )
    except (ValueError, np.linalg.LinAlgError, FloatingPointError) as exc:
        return _failed(curve.geometry, curve.mode, n, f"fit failed: {exc}")
    q = sol.x
    res, coef = projected(curve, q, t, y)
    p = np.concatenate([coef, q])
    rss = float(res[:n] @ res[:n])
    n_par = p.size - (1 if curve.prior is not None else 0)
    fit = ConductionFit(
        geometry=curve.geometry,
        ambient_mode=curve.mode,
        n_points=n,
        t_last=float(t[-1]),
        param_names=curve.names,
        params=p,
        rss=rss,
        n_params=n_par,
        _curve=curve,
    )
    fit.aicc = aicc(rss, n, n_par)
    fit.rmse = math.sqrt(rss / n)
    n_lin = len(curve.linear_names)
    fit.Ti = float(p[0])
    fit.biot, fit.a_per_s = math.exp(q[0]), math.exp(q[1])
    fit.t0_s = curve.t0(q)
    if curve.mode == "fitted":
        fit.Ta = float(p[1])
    elif curve.mode == "known":
        fit.Ta = float(curve.ambient)  # type: ignore[arg-type]
    else:
        fit.Ta = float(curve.ambient_fn(np.array([t[-1]]))[0])  # type: ignore[misc]
    z1, c1 = first_term(curve.geometry, fit.biot)
    fit.k_per_s = float(z1) ** 2 * fit.a_per_s
    fit.lag_factor_j = float(c1)
    fit.value_at_last = float(curve.full(p, t[-1:])[0])
    fit.cov = covariance(curve, p, t, rss, n, y)
    fit._data, fit._bounds = (t, y), (lo, hi)
    fit._draws = (
        ceta.draw_params(p, fit.cov, N_DRAWS, dof=n - p.size) if fit.cov is not None else None
    )
    if fit._draws is not None:
        # Keep draws inside the eigen-solver's range (beyond it nothing changes in the curve).
        fit._draws[:, n_lin] = np.clip(
            fit._draws[:, n_lin], math.log(1.0001 * BIOT_MIN), math.log(0.9999 * BIOT_MAX)
        )
        # Heavy-tailed draws of the time scale / start stay within the fit's own bounds.
        for j in range(1, len(lo)):
            fit._draws[:, n_lin + j] = np.clip(fit._draws[:, n_lin + j], lo[j], hi[j])
    _parameter_intervals(fit, n_lin)
    if fit.biot <= FIT_BIOT_MIN * 1.01:
        fit.warnings.append("Biot number at its lower bound: the probe behaves as a lumped body")
    if fit.biot >= FIT_BIOT_MAX * 0.99:
        fit.warnings.append("Biot number at its upper bound: the surface follows the ambient")
    if not sol.success:
        fit.warnings.append(f"least squares stopped early: {sol.message}")
    return fit


def _parameter_intervals(fit: ConductionFit, n_lin: int) -> None:
    """90 % intervals for Bi, k and Ta from the same draws as the crossing time."""
    d = fit._draws
    if d is None:
        return
    log_bi = np.clip(d[:, n_lin], math.log(1.0001e-5), math.log(0.9999e4))
    lo_hi = np.quantile(np.exp(log_bi), [0.05, 0.95])
    fit.biot_lo, fit.biot_hi = float(lo_hi[0]), float(lo_hi[1])
    z1, _ = first_term(fit.geometry, np.exp(log_bi))
    k = z1**2 * np.exp(d[:, n_lin + 1])
    fit.k_lo_per_s, fit.k_hi_per_s = (float(v) for v in np.quantile(k, [0.05, 0.95]))
    if fit.ambient_mode == "fitted" and n_lin == 2:
        fit.ambient_lo, fit.ambient_hi = (float(v) for v in np.quantile(d[:, 1], [0.05, 0.95]))


def select_geometry(
    t_s: ArrayLike, y: ArrayLike, *, geometries: tuple[str, ...] = GEOMETRIES, **kwargs: Any
) -> tuple[ConductionFit, dict[str, float]]:
    """Fit each geometry and keep the lowest AICc (same parameter count, so: the lowest RSS).

    Returns (best fit, {geometry: aicc}); if every fit fails, the first failed fit.
    """
    fits = [fit_conduction(t_s, y, g, **kwargs) for g in geometries]
    scores = {f.geometry: f.aicc for f in fits}
    good = [f for f in fits if f.ok]
    if not good:
        return fits[0], scores
    return min(good, key=lambda f: f.aicc), scores
