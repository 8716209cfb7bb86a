"""The core-probe curve as a function of its parameters, for one data set (conduction.py fits it).

Parameters: linear (Ti[, Ta]) then nonlinear (log Bi, log a[, dt0]); for given nonlinear ones the
centre temperature is linear in the others,

    T = A(q) @ (Ti[, Ta]) + r0(q),

which the variable projection (:func:`projected`) and the coarse starting grid
(:func:`start_grid`) use; :func:`covariance` is s^2 (J'J)^-1 with J by central differences.
"""

from __future__ import annotations

import math

import numpy as np
from numpy.typing import NDArray
from thermeta.predictors.conduction_ambient import AmbientFn, ramp_part
from thermeta.predictors.conduction_series import first_term, modes, theta_centre

Float = NDArray[np.float64]
_BI_GRID = (0.01, 0.06, 0.3, 1.0, 3.0, 10.0, 40.0)
_K_SPAN_GRID = tuple(np.geomspace(0.03, 30.0, 11))


class Curve:
    """The model as a function of the parameters for one data set.

    Full parameter vector: linear (Ti[, Ta]) then nonlinear (log Bi, log a[, dt0]), with the
    episode start t0 = start_s + dt0 * span_s (dt0 in units of the data's span).
    """

    def __init__(
        self,
        geometry: str,
        mode: str,
        start_s: float,
        span_s: float,
        ambient: float | None,
        ambient_fn: AmbientFn | None,
        fit_start: bool,
        prior: tuple[float, float] | None = None,
    ) -> None:
        self.geometry, self.mode, self.start_s, self.span_s = geometry, mode, start_s, span_s
        self.ambient, self.ambient_fn, self.fit_start = ambient, ambient_fn, fit_start
        # (Ta_given, weight): a Gaussian prior on a fitted ambient, as one extra residual row
        # weight * (Ta - Ta_given) with weight = noise sd / ambient sd.
        self.prior = prior

    @property
    def linear_names(self) -> tuple[str, ...]:
        return ("Ti", "Ta") if self.mode == "fitted" else ("Ti",)

    @property
    def nonlinear_names(self) -> tuple[str, ...]:
        return ("log_bi", "log_a", "dt0") if self.fit_start else ("log_bi", "log_a")

    @property
    def names(self) -> tuple[str, ...]:
        return self.linear_names + self.nonlinear_names

    def t0(self, q: Float) -> float:
        return self.start_s + (float(q[2]) * self.span_s if self.fit_start else 0.0)

    def basis(self, q: Float, t_abs: Float, step_s: float | None = None) -> tuple[Float, Float]:
        """(A, r0) with  T = A @ (linear params) + r0  for nonlinear params q."""
        bi, a = math.exp(q[0]), math.exp(q[1])
        t0 = self.t0(q)
        tr = t_abs - t0
        th = theta_centre(a * tr, bi, self.geometry)
        if self.mode == "fitted":
            # T = Ti theta + Ta (1 - theta)
            return np.column_stack([th, 1.0 - th]), np.zeros_like(th)
        if self.mode == "known":
            # T = Ti theta + Ta (1 - theta), Ta given
            return th[:, None], float(self.ambient) * (1.0 - th)  # type: ignore[arg-type]
        fn = self.ambient_fn
        if fn is None:
            raise ValueError("measured mode needs an ambient series")
        ta0 = float(fn(np.array([t0]))[0])
        z, c = modes(self.geometry, bi)
        # T = Ti theta + Ta(t0) (1 - theta) + R(t)
        r = ramp_part(tr, fn, t0, a, z, c, step_s=step_s or self.span_s / 256)
        return th[:, None], ta0 * (1.0 - th) + r

    def full(self, p: Float, t_abs: Float, step_s: float | None = None) -> Float:
        n_lin = len(self.linear_names)
        a_mat, r0 = self.basis(p[n_lin:], t_abs, step_s)
        return a_mat @ p[:n_lin] + r0


def projected(curve: Curve, q: Float, t: Float, y: Float) -> tuple[Float, Float]:
    """Residual after the best linear parameters for q, and those parameters."""
    a_mat, r0 = curve.basis(q, t)
    target = y - r0
    if curve.prior is not None:
        a_mat = np.vstack([a_mat, [0.0, curve.prior[1]]])
        target = np.append(target, curve.prior[0] * curve.prior[1])
    # Normal equations for the 1-2 linear parameters (lstsq if they are degenerate).
    ata = a_mat.T @ a_mat
    atb = a_mat.T @ target
    if ata.shape == (1, 1):
        coef = atb / ata[0] if ata[0, 0] > 0 else np.zeros(1)
    else:
        det = ata[0, 0] * ata[1, 1] - ata[0, 1] ** 2
        if det > 1e-10 * ata[0, 0] * ata[1, 1]:
            coef = (
                np.array(
                    [
                        ata[1, 1] * atb[0] - ata[0, 1] * atb[1],
                        ata[0, 0] * atb[1] - ata[0, 1] * atb[0],
                    ]
                )
                / det
            )
        else:
            coef, *_ = np.linalg.lstsq(a_mat, target, rcond=None)
    return target - a_mat @ coef, coef


def start_grid(curve: Curve, t: Float, y: Float) -> Float:
    best, best_q = math.inf, None
    for bi in _BI_GRID:
        z1 = float(first_term(curve.geometry, bi)[0])
        for k_span in _K_SPAN_GRID:
            q = [math.log(bi), math.log(k_span / curve.span_s / z1**2)]
            for dt0 in (0.0, -0.1, -0.4) if curve.fit_start else (None,):
                qq = np.array(q if dt0 is None else q + [dt0])
                r, _ = projected(curve, qq, t, y)
                s = float(r @ r)
                if s < best:
                    best, best_q = s, qq
    if best_q is None:
        raise ValueError("no finite starting point")
    return best_q


def covariance(
    curve: Curve, p: Float, t: Float, rss: float, n: int, y: Float | None = None
) -> Float | None:
    """s^2 (J'J)^-1 with J by central differences of the full model (pseudo-inverse if singular)."""
    if n <= p.size:
        return None
    steps = np.maximum(np.abs(p), 1.0) * 1e-6
    jac = np.empty((t.size, p.size))
    for i, h in enumerate(steps):
        dp = np.zeros_like(p)
        dp[i] = h
        jac[:, i] = (curve.full(p + dp, t) - curve.full(p - dp, t)) / (2 * h)
    s2 = rss / (n - p.size)
    if n - p.size < 2 and y is not None:
        # one degree of freedom cannot measure the scatter: at least the assumed one
        from thermeta.predictors.few import assumed_scatter

        s2 = max(s2, assumed_scatter(np.asarray(y, float)) ** 2)
    info = jac.T @ jac
    if curve.prior is not None:
        info[1, 1] += curve.prior[1] ** 2
    try:
        cov = np.asarray(s2 * np.linalg.pinv(info, rcond=1e-12, hermitian=True), dtype=np.float64)
        return cov
    except np.linalg.LinAlgError:
        return None
