"""Profile-likelihood interval for the crossing time of a fitted core-probe curve.

For a trial crossing instant tau the curve is refitted under the constraint T(tau) = threshold.
The constraint is linear in the linear parameters (Ti[, Ta]), so for given nonlinear parameters q
it is met exactly by  c = c_p + N lam  (c_p the minimum-norm solution, N the constraint's null
space) and lam is a linear least-squares solve; q is then optimised starting from the best fit.
With sigma profiled out, the small-sample form of the likelihood-ratio test (the extra sum of
squares of one constraint; exact for a model linear in its parameters, and the chi2_1 test
n ln(RSS / RSS_min) <= 2.706 as n grows) is

    D(tau) = (n - p) (RSS(tau) / RSS_min - 1)

and the 90 % interval is {tau : D(tau) <= F(1, n - p; 1 - alpha')}.  With the few readings of an
early centre probe (n ~ 15-30, p = 3-4) the chi2 cut-off is too tight and the intervals undercover.
An end that is not reached within the search horizon is unbounded (None): some curves that fit
about as well never cross.

Small-sample level.  F(1, n - p; 0.90) is exact only for a model linear in its parameters.
Early on, a centre probe's curve is poorly determined and strongly nonlinear in (ln Bi, ln a),
and D at the true crossing exceeds it more often than 1 time in 10: measured on seeded centre
cases (slab, cylinder, sphere; Bi 0.3-5; given or measured ambient), 15-16 % with fewer than 40
readings, 12 % with 40-80 and 10-11 % above 80 (at 25 % of the way to the crossing the same
14 % with the ambient known exactly and the readings unquantised: the curve, not the ambient or
the rounding).  A parametric bootstrap of D at the fitted curve did not reproduce the excess
(its 90th percentile stayed near the F one; perhaps the fitted curve is better determined than
the true one where they miss), so the level is corrected empirically,
alpha' = alpha (n - p) / (n - p + SMALL_SAMPLE_DOF): 0.94 at 10 degrees of freedom, 0.92 at
30, 0.904 at 150, and 0.90 as n grows (an O(1 / (n - p)) correction, as a Bartlett factor is;
the scale 6 is half what the figures above ask for alone, as an independent seed covered 89.5 %
before the correction).

Whole-range scan.  The constrained refits start from the best fit and can stay in its basin.
Early on, while the centre has barely moved, curves with very different (Bi, a) fit about as
well: a lumped-like body at the lowest Biot number with a slow rate, or a thick one at Bi ~ 1
with a fast one, and the refits from a best fit at one end never reach the other (the demo's
large carton, an hour after its trailer's unit failed: best fit Bi 0.0012, crossing in 22 days,
"90 %" from 10 days, the truth 3.6 h away with D = 0.17 at the true parameters).  The interval
is the projection of the likelihood-ratio region, {eta(theta) : D(theta) <= cut-off}, so every
point of a (log Bi, log a) grid over the fit's whole range (Bi 0.001-100, a over its 8 decades;
the linear parameters at their best for each) that passes the cut-off is inside it: the ends
are widened to the crossings of those points, and the upper end opens when one of them never
crosses.  (Bi = hL/k of foods in air spans about 0.01-20 for h 5-30 W/m2K, L 1-30 cm,
k 0.4-1.6 W/mK, from memory: the grid covers it.)
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING

import numpy as np
from numpy.typing import NDArray
from scipy.optimize import least_squares
from thermeta.predictors.conduction_curve import projected
from thermeta.predictors.conduction_eta import etas
from thermeta.predictors.quantiles import chi2_ppf, f_ppf

if TYPE_CHECKING:
    from thermeta.predictors.conduction import ConductionFit, _Curve

Float = NDArray[np.float64]
CHI2_1_90 = 2.705543454095404  # the large-sample cut-off, for reference
# Search: steps grow by STEP_GROWTH until the statistic passes the cut-off, then regula falsi
# (at most REFINE_ITERS refits) to REFINE_REL of the last step; each constrained refit gets at
# most MAX_NFEV evaluations from a warm start (RETRY_NFEV for the retry from the best fit).
STEP_GROWTH = 2.5
REFINE_REL = 0.1
MAX_NFEV = 20
REFINE_ITERS = 6
RETRY_NFEV = 40
LSQ_TOL = 1e-6
ALPHA = 0.10  # 1 - the interval's nominal level
SMALL_SAMPLE_DOF = 6.0  # the small-sample level's scale (module docstring)
SCAN_BIOT = 13  # whole-range scan (module docstring): Biot numbers over the fit's range
SCAN_PER_DECADE_A = 4  # and time scales a, per decade of the fit's range


def cut_off(dof: int) -> float:
    """The F(1, dof) cut-off on D at the small-sample corrected level 1 - alpha'."""
    alpha = ALPHA * dof / (dof + SMALL_SAMPLE_DOF)
    return float(f_ppf(1.0 - alpha, 1, dof))


def scale_and_cut(rss_min: float, dof: int, y: Float) -> tuple[float, float]:
    """The scatter s^2 the statistic divides by, and its cut-off.  With two or more degrees of
    freedom the readings measure it (s^2 = RSS_min / dof, the F cut-off above); with one they
    cannot, so it is at least the assumed scatter of a reading (few.assumed_scatter, as the
    lumped model's few-reading forecasts do), taken as known: a chi2(1) cut-off at the same
    small-sample level."""
    if dof >= 2:
        return rss_min / dof, cut_off(dof)
    from thermeta.predictors.few import assumed_scatter

    alpha = ALPHA * dof / (dof + SMALL_SAMPLE_DOF)
    s2 = max(rss_min / max(dof, 1), assumed_scatter(np.asarray(y, float)) ** 2)
    return s2, float(chi2_ppf(1.0 - alpha, 1))


def _constrained_residual(
    curve: _Curve, q: Float, t: Float, y: Float, tau: float, threshold: float
) -> tuple[Float, Float]:
    # one evaluation for the readings and the constraint's instant (one eigenvalue solve)
    a_all, r_all = curve.basis(q, np.append(t, tau))
    a_mat, r0 = a_all[:-1], r_all[:-1]
    row, b = a_all[-1], threshold - r_all[-1]
    target = y - r0
    if curve.prior is not None:
        a_mat = np.vstack([a_mat, [0.0, curve.prior[1]]])
        target = np.append(target, curve.prior[0] * curve.prior[1])
    norm2 = float(row @ row)
    if norm2 < 1e-300:
        return np.full(target.size, 1e6), np.zeros(row.size)
    c_p = row * b / norm2
    if row.size == 1:
        c = c_p
    else:
        null = np.array([row[1], -row[0]]) / math.sqrt(norm2)
        col = a_mat @ null
        denom = float(col @ col)
        lam = float(col @ (target - a_mat @ c_p)) / denom if denom > 0 else 0.0
        c = c_p + lam * null
    return target - a_mat @ c, c


def profile_interval(
    fit: ConductionFit,
    t: Float,
    y: Float,
    threshold: float,
    t_now: float,
    eta_s: float,
    lo_bounds: list[float],
    hi_bounds: list[float],
) -> tuple[float | None, float | None]:
    """(lo_s, hi_s) of the 90 % profile-likelihood interval for the crossing, from t_now."""
    curve = fit._curve
    if curve is None or math.isnan(eta_s) or fit.rss <= 0:
        return None, None
    n = int(t.size)
    n_lin = len(curve.linear_names)
    q_hat = fit.params[n_lin:].copy()
    # The minimum includes the prior row of a softly known ambient, like every refit below.
    # (the scan's own baseline: the readings' residuals alone, on the time steps of the scan's
    # ambient sum; the search's includes the trial instant, as its refits do)
    r_hat, _ = projected(curve, q_hat, t, y)
    rss_scan = max(float(r_hat @ r_hat), 1e-300)
    if math.isfinite(eta_s):
        r_hat, _ = _constrained_residual(curve, q_hat, t, y, t_now + eta_s, threshold)
    rss_min = max(float(r_hat @ r_hat), 1e-300)
    lo_b, hi_b = np.array(lo_bounds), np.array(hi_bounds)
    state = {"q": q_hat}
    dof = n - fit.n_params
    if dof < 1:
        return None, None
    s2, cut = scale_and_cut(rss_min, dof, y)
    if math.isinf(eta_s):
        # the best fit never crosses: no search from it, but other curves that fit about as
        # well may cross (an early centre probe still flat): the earliest of them
        scan = scan_range(curve, t, y, threshold, t_now, rss_scan + cut * s2, q_hat, lo_b, hi_b)
        return (None if scan is None else scan[0]), None

    def stat(tau: float) -> float:
        def res(q: Float) -> Float:
            return _constrained_residual(curve, q, t, y, tau, threshold)[0]

        q0 = np.clip(state["q"], lo_b, hi_b)
        sol = least_squares(
            res,
            q0,
            bounds=(lo_b, hi_b),
            method="trf",
            xtol=LSQ_TOL,
            ftol=LSQ_TOL,
            max_nfev=MAX_NFEV,
        )
        rss, q_best = float(sol.fun @ sol.fun), sol.x
        d = (max(rss, rss_min) - rss_min) / s2 - cut
        if d > 0:
            # Before calling tau outside, refit from the best fit's q too: a warm start from the
            # previous trial can stay in a basin (Bi and the time scale trade off along a long
            # valley) that the constrained optimum has left, and the interval then comes out
            # too narrow (seen on early centre probes: 70 % coverage instead of 82 %).
            sol = least_squares(
                res,
                np.clip(q_hat, lo_b, hi_b),
                bounds=(lo_b, hi_b),
                method="trf",
                xtol=LSQ_TOL,
                ftol=LSQ_TOL,
                max_nfev=RETRY_NFEV,
            )
            r2 = float(sol.fun @ sol.fun)
            if r2 < rss:
                rss, q_best = r2, sol.x
            d = (max(rss, rss_min) - rss_min) / s2 - cut
        state["q"] = q_best
        return d

    t_hat = t_now + eta_s
    scale = max(eta_s, 0.02 * curve.span_s, 1.0)
    # First step from the delta method's sd (gradient by central differences), so the search
    # brackets each end within a few steps however narrow the interval is.
    first = 0.03 * scale
    if fit.cov is not None and np.all(np.isfinite(fit.cov)):
        p_hat = fit.params
        sd_p = np.sqrt(np.maximum(np.diag(fit.cov), 0.0))
        h = np.clip(0.1 * sd_p, 1e-9, 0.01 * np.maximum(np.abs(p_hat), 1.0))
        rows = np.vstack([p_hat + np.diag(h), p_hat - np.diag(h)])
        e = etas(curve, rows, threshold, t_now, curve.span_s)
        if np.all(np.isfinite(e)):
            grad = (e[: p_hat.size] - e[p_hat.size :]) / (2 * h)
            sd = math.sqrt(max(float(grad @ fit.cov @ grad), 0.0))
            if sd > 0:
                first = min(first, 0.5 * sd)
    horizon = t_now + 50.0 * max(eta_s, curve.span_s)

    def search(direction: int) -> float | None:
        state["q"] = q_hat
        # D(t_hat) = 0 at the best fit, so the statistic starts at -chi2 there
        prev, d_prev, step = t_hat, -cut, max(first, 0.5)
        while True:
            tau = prev + direction * step
            if direction < 0 and tau <= t_now:
                d = stat(t_now)
                return 0.0 if d <= 0 else _refine(prev, d_prev, t_now, d)
            if direction > 0 and tau >= horizon:
                return None
            d = stat(tau)
            if d > 0:
                return _refine(prev, d_prev, tau, d)
            prev, d_prev, step = tau, d, step * STEP_GROWTH

    def _refine(inside: float, d_in: float, outside: float, d_out: float) -> float:
        # Illinois regula falsi on the bracket the search found (its end values are known):
        # D is smooth in tau, so a few steps reach REFINE_REL of the bracket.
        q_keep = state["q"]
        a, fa, b, fb = inside, d_in, outside, d_out
        tol = max(REFINE_REL * abs(outside - inside), 0.5)
        last = 0
        for _ in range(REFINE_ITERS):
            root = b - fb * (b - a) / (fb - fa) if fb != fa else 0.5 * (a + b)
            fr = stat(root)
            if fr > 0:
                b, fb = root, fr
                fa = fa / 2 if last > 0 else fa
                last = 1
            else:
                a, fa = root, fr
                fb = fb / 2 if last < 0 else fb
                last = -1
            if abs(fr) < 0.05 or abs(b - a) < tol:
                break
        state["q"] = q_keep
        # the root inside the final bracket (a: D <= 0, b: D > 0)
        root = b - fb * (b - a) / (fb - fa) if fb != fa else 0.5 * (a + b)
        return float(root) - t_now

    scan = scan_range(curve, t, y, threshold, t_now, rss_scan + cut * s2, q_hat, lo_b, hi_b)
    # a scanned curve inside the cut-off that never crosses opens the upper end: no search
    hi = None if scan is not None and scan[1] is None else search(+1)
    lo = search(-1)
    if scan is not None:
        s_lo, s_hi = scan
        lo = s_lo if lo is None else min(lo, s_lo)
        hi = None if (hi is None or s_hi is None) else max(hi, s_hi)
    return lo, hi


def scan_range(
    curve: _Curve,
    t: Float,
    y: Float,
    threshold: float,
    t_now: float,
    rss_cut: float,
    q_hat: Float,
    lo_b: Float,
    hi_b: Float,
) -> tuple[float, float | None] | None:
    """(earliest, latest) crossing, s from t_now, over the grid points of (log Bi, log a) whose
    residual sum is within ``rss_cut`` (latest None: one of them never crosses); None when no
    grid point passes.  A start offset, when fitted, stays at the best fit's."""
    n_a = max(int(math.ceil((hi_b[1] - lo_b[1]) / math.log(10.0) * SCAN_PER_DECADE_A)) + 1, 2)
    rows = []
    for log_bi in np.linspace(lo_b[0], hi_b[0], SCAN_BIOT):
        for log_a in np.linspace(lo_b[1], hi_b[1], n_a):
            q = q_hat.copy()
            q[0], q[1] = log_bi, log_a
            r, coef = projected(curve, q, t, y)
            if np.all(np.isfinite(r)) and float(r @ r) <= rss_cut:
                rows.append(np.concatenate([coef, q]))
    if not rows:
        return None
    e = etas(curve, np.array(rows), threshold, t_now, curve.span_s)
    e = e[~np.isnan(e)]
    if e.size == 0:
        return None
    return float(np.min(e)), (None if np.any(np.isinf(e)) else float(np.max(e)))
