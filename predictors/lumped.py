"""Newton's law of cooling fitted by variable projection, with profile-likelihood intervals.

Model, with d = t - t_first (seconds):

    T(d) = a + b e^(-k d)          a = ambient, b = T(t_first) - a,  k > 0

For a fixed k the model is linear in (a, b), so the fit reduces to one dimension (k) and every
quantity below comes in closed form from the sums n, Sy, Syy and, per k, Se, See, Sye
(e = e^(-k d)).  The 90 % intervals are profile-likelihood intervals,

    {theta : RSS_profile(theta) <= RSS_min (1 + F(0.90; 1, dof) / dof)},

at little more cost than the fit: for k, the profile RSS_k on a grid of k (refined near the
estimate); for the ambient a and the crossing time eta, the projection of the joint region
{RSS <= cut}, which for each fixed k is an ellipse in (a, b) known in closed form from the same
sums (the crossing time enters through the linear constraint a + b e^(-k (D + eta)) = threshold,
D = t_last - t_first), taken over the k grid.

Ambient modes:
- fitted: a free within ``bounds`` (a plausible range);
- known: a Gaussian prior a ~ N(a0, ambient_sd^2), folded into the objective as
  lam (a - a0)^2 with lam = sigma^2 / ambient_sd^2 (sigma: reading noise), so a given ambient that
  is a couple of degrees off widens the interval instead of biasing it unseen; ambient_sd = 0
  fixes a.

Point forecast with the ambient fitted and no prior: a fit that crosses keeps its present value
and slope, and its bend ahead only in the measure the readings show it (``bend_weight``: k shrunk by
(1 - F(0.99; 1, dof) / F)+, the tangent at 0); the intervals stay those of the unshrunk fit.

A prior on k learned from past episodes (``k_prior = (mu, sd)`` of ln k) enters the same way, as a
penalty lam_k (ln k - mu)^2 with lam_k = sigma^2 / sd^2 added to the profile RSS_k: it is a prior,
not a constraint, so readings with curvature that contradict it outweigh it as they accumulate.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from scipy.optimize import minimize_scalar
from thermeta.predictors.lumped_profile import KPenalty, add_intervals, solve_fixed_k, sums
from thermeta.predictors.outcome import Reason
from thermeta.predictors.quantiles import f_ppf

CONF = 0.90
KD_MIN, KD_MAX = 0.005, 60.0  # k * span: from nearly straight to relaxed in the first 2 %
# the point forecast keeps the fitted bend ahead only in the measure the readings show it: shrunk by
# (1 - F(BEND_CONF; 1, dof) / F)+, F the bend's F statistic against a straight line (bend_weight)
BEND_CONF = 0.99


@dataclass
class LumpedFit:
    """The lumped fit of one regime.  Times: seconds; eta from t_last."""

    ok: bool
    reason: str | None = None
    k_per_s: float = math.nan
    ambient: float = math.nan
    code: Reason | None = None  # why there is no fit
    value_fit_now: float = math.nan
    t_first: float = math.nan
    t_last: float = math.nan
    amplitude: float = math.nan  # b: T(t_first) - ambient
    rss: float = math.nan
    dof: int = 0  # readings plus priors (one pseudo-observation each) minus parameters
    n_par: int = 3  # parameters fitted (the ambient counts when a prior, not a constant, holds it)
    sigma: float = math.nan
    eta_s: float | None = None
    eta_lo_s: float | None = None
    eta_hi_s: float | None = None
    k_lo: float | None = None
    k_hi: float | None = None
    ambient_lo: float | None = None
    ambient_hi: float | None = None
    direction: str | None = None
    residuals: np.ndarray = field(default_factory=lambda: np.zeros(0))
    n: int = 0
    cov: np.ndarray | None = None  # set by callers that need it (the measured-ambient forecast)
    bounds: tuple[float, float] = (-math.inf, math.inf)  # the plausible range the ambient had
    straight: bool = False  # no clear curvature: eta from the straight tangent (see bend_weight)
    bend_kept: float = 1.0  # share of the fitted k kept ahead in the point ETA (see bend_weight)
    # set when an unbent straight trend overrides a fitted level-off: its value and slope (per s)
    # at the newest reading, which the point ETA and the curve ahead follow
    trend_now: tuple[float, float] | None = None
    inflate: float = 1.0  # the profile cut's margin times this (n / n_eff, correlated residuals)

    def curve(self, t: np.ndarray) -> np.ndarray:
        """T(t) = a + b e^(-k (t - t_first))."""
        return self.ambient + self.amplitude * np.exp(
            -self.k_per_s * (np.asarray(t) - self.t_first)
        )


def quick_rss(t: np.ndarray, y: np.ndarray, n_grid: int = 40) -> float:
    """Minimum RSS of a fitted-ambient lumped curve: the varpro profile on a k grid, its minimum
    refined by a parabola in log k (the profile is smooth there).  For regime searches."""
    n = t.size
    if n < 5 or t[-1] <= t[0]:
        return math.inf
    d = t - t[0]
    yc = y - y.mean()
    lk = np.linspace(math.log(KD_MIN), math.log(KD_MAX), n_grid) - math.log(d[-1])
    r = solve_fixed_k(sums(d, yc, np.exp(lk)), 0.0, 0.0, -np.inf, np.inf)[2]
    i = int(np.argmin(r))
    if 0 < i < n_grid - 1:
        den = r[i - 1] - 2 * r[i] + r[i + 1]
        if den > 0:
            return float(max(r[i] - 0.125 * (r[i - 1] - r[i + 1]) ** 2 / den, 0.0))
    return float(r[i])


def crossing_eta(
    value_now: float,
    ambient: float,
    k: float,
    thr: float,
    value_start: float | None = None,
    limit: str | None = None,
) -> tuple[float | None, str]:
    """Seconds from now until T(x) = a + (T_now - a) e^(-k x) reaches thr, and the direction.

    eta = ln((T_now - a) / (thr - a)) / k when the asymptote a lies beyond thr; otherwise 0 if the
    curve already crossed thr within the data (value_start on the other side), else None.
    limit "upper"/"lower" (optional): only an upward / downward crossing counts, and a value
    already beyond the limit is past (0).
    """
    if ambient > value_now:
        direction = "rising"
    elif ambient < value_now:
        direction = "falling"
    else:
        direction = "rising" if thr > value_now else "falling"
    if limit == "upper" and value_now >= thr or limit == "lower" and value_now <= thr:
        return 0.0, direction
    side_now, side_inf = value_now - thr, ambient - thr
    if side_now == 0:
        return 0.0, direction
    if side_now * side_inf < 0 and k > 0:
        if (
            limit == "upper"
            and direction != "rising"
            or limit == "lower"
            and direction != "falling"
        ):
            return None, direction
        return math.log((value_now - ambient) / (thr - ambient)) / k, direction
    if limit is None and value_start is not None and (value_start - thr) * side_now < 0:
        return 0.0, direction
    return None, direction


def fit_lumped(
    t: np.ndarray,
    y: np.ndarray,
    threshold: float,
    *,
    ambient: float | None = None,
    ambient_sd: float = 0.0,
    bounds: tuple[float, float] | None = None,
    noise_sd: float | None = None,
    intervals: bool = True,
    limit: str | None = None,
    k_prior: tuple[float, float] | None = None,
    inflate: float = 1.0,
) -> LumpedFit:
    """Fit T(t) = a + b e^(-k (t - t_first)) to sorted, cleaned readings; never raises on data.

    k_prior: (mean, sd) of ln(k_per_s), a Gaussian prior (see the module docstring).
    inflate: >= 1, the intervals' cut margin times this (n / n_eff for correlated residuals).
    """
    if k_prior is not None and not (math.isfinite(k_prior[0]) and k_prior[1] > 0):
        raise ValueError(f"k_prior must be (finite mean, sd > 0) of ln k, got {k_prior!r}")
    t = np.asarray(t, float)
    y = np.asarray(y, float)
    n = t.size
    n_par = 2 if (ambient is not None and ambient_sd == 0) else 3
    # each Gaussian prior is one more observation (of a, of ln k) whose squared residual is in
    # the penalised RSS: it adds one degree of freedom to the RSS's, as a reading would
    n_prior = int(ambient is not None and ambient_sd > 0) + int(k_prior is not None)
    # a given ambient with a spread is a Gaussian prior: one more observation of a
    if n < n_par + 2 - (1 if ambient is not None and ambient_sd > 0 else 0):
        return LumpedFit(False, f"too few readings to fit ({n})", n=n, code=Reason.TOO_FEW_READINGS)
    D = float(t[-1] - t[0])
    if D <= 0:
        return LumpedFit(False, "all readings at one instant", n=n, code=Reason.ONE_INSTANT)
    d = t - t[0]
    ybar = float(y.mean())
    yc = y - ybar
    thr = threshold - ybar
    spread = max(float(np.ptp(y)), 1e-6)
    if bounds is None:
        bounds = (float(y.min()) - 10 * spread - 10.0, float(y.max()) + 10 * spread + 10.0)
    lo, hi = bounds[0] - ybar, bounds[1] - ybar
    if ambient is None:
        lam, a0 = 0.0, 0.0
    else:
        a0 = float(ambient) - ybar
        lam = math.inf if ambient_sd <= 0 else 0.0
    k_grid = np.geomspace(KD_MIN, KD_MAX, 56) / D
    if k_prior is not None:
        # early on the prior's k may lie below the data's grid (k D < KD_MIN): cover it too
        k_grid = np.unique(
            np.concatenate([k_grid, np.exp(k_prior[0] + k_prior[1] * np.linspace(-4.0, 4.0, 17))])
        )
    pen = KPenalty(k_prior)

    def objective(logk: float, lam_: float) -> float:
        s1 = sums(d, yc, np.array([math.exp(logk)]))
        return float(solve_fixed_k(s1, lam_, a0, lo, hi)[2][0] + pen(s1.k)[0])

    def best_k(lam_: float) -> float:
        s0 = sums(d, yc, k_grid)
        rss0 = solve_fixed_k(s0, lam_, a0, lo, hi)[2] + pen(k_grid)
        i = int(np.argmin(rss0))
        lk = np.log(k_grid)
        a_, b_ = lk[max(i - 1, 0)], lk[min(i + 1, lk.size - 1)]
        if a_ == b_:
            return float(k_grid[i])
        res = minimize_scalar(
            objective, bounds=(a_, b_), args=(lam_,), method="bounded", options={"xatol": 1e-6}
        )
        return float(math.exp(res.x)) if res.fun <= rss0[i] else float(k_grid[i])

    if (ambient is not None and ambient_sd > 0) or k_prior is not None:
        # lam = sigma^2 / sd_a^2; sigma from the readings' own noise, then from the fit itself
        sig = noise_sd if noise_sd and noise_sd > 0 else 0.1 * spread
        for _ in range(2):
            if ambient is not None and ambient_sd > 0:
                lam = sig**2 / ambient_sd**2
            pen.sigma = sig
            k_hat = best_k(lam)
            r_hat = objective(math.log(k_hat), lam)
            sig = max(math.sqrt(r_hat / max(n + n_prior - n_par, 1)), 1e-9)
    else:
        k_hat = best_k(lam)
    s_hat = sums(d, yc, np.array([k_hat]))
    a_hat, b_hat, r_hat = (float(v[0]) for v in solve_fixed_k(s_hat, lam, a0, lo, hi))
    r_hat += float(pen(s_hat.k)[0])
    fit_y = a_hat + b_hat * np.exp(-k_hat * d)
    dof = max(n + n_prior - n_par, 1)
    fit = LumpedFit(
        True,
        k_per_s=k_hat,
        ambient=a_hat + ybar,
        amplitude=b_hat,
        t_first=float(t[0]),
        t_last=float(t[-1]),
        value_fit_now=float(fit_y[-1] + ybar),
        rss=r_hat,
        dof=dof,
        n_par=n_par,
        sigma=math.sqrt(r_hat / dof),
        residuals=yc - fit_y,
        n=n,
        bounds=(lo + ybar, hi + ybar),
    )
    fit.eta_s, fit.direction = crossing_eta(
        fit.value_fit_now,
        fit.ambient,
        k_hat,
        threshold,
        value_start=a_hat + b_hat + ybar,
        limit=limit,
    )
    # only a forecast crossing is brought forward: a fit that levels off short of the threshold
    # keeps "never" (its interval still says whether a crossing is possible).  A weakly bent
    # level-off looks the same in the readings whether the load levels off short of the
    # threshold or warms toward a far ambient, so "never" stays the point forecast there
    if ambient is None and k_prior is None and fit.eta_s is not None and fit.eta_s > 0:
        w = bend_weight(d, yc, r_hat, dof)
        slope_now = -k_hat * b_hat * math.exp(-k_hat * D)  # dT/dt of the fit at the last reading
        eta_w = shrunk_eta(float(fit_y[-1]), slope_now, w * k_hat, thr, limit)
        if w < 1.0 and eta_w is not None:
            fit.eta_s, fit.bend_kept, fit.straight = eta_w, w, w == 0.0
    elif ambient is None and k_prior is None and fit.eta_s is None and n >= 3:
        # a level-off the readings do not show (no bend at all by the F test) whose straight
        # trend reaches the threshold within as long again as it has been watched: the trend
        # (the straight line through the readings, the model the F test could not reject)
        if bend_weight(d, yc, r_hat, dof) == 0.0:
            slope, icpt = np.polyfit(d, yc, 1)
            eta_t = shrunk_eta(float(icpt + slope * D), float(slope), 0.0, thr, limit)
            if eta_t is not None and eta_t <= TREND_REACH * D:
                fit.eta_s, fit.bend_kept, fit.straight = eta_t, 0.0, True
                fit.direction = "rising" if slope > 0 else "falling"
                fit.trend_now = (float(icpt + slope * D + ybar), float(slope))
    if intervals:
        fit.inflate = max(float(inflate), 1.0)
        add_intervals(fit, d, yc, thr, lam, a0, lo, hi, ybar, k_grid, pen)
    return fit


TREND_REACH = (
    1.0  # an unbent trend is taken over a level-off up to this many spans of readings ahead
)


def bend_weight(d: np.ndarray, yc: np.ndarray, rss: float, dof: int) -> float:
    """The share w of the fitted bend that the point forecast keeps ahead: (1 - q / F)+ with
    F = (RSS_line - RSS) / (RSS / dof) the bend's F statistic against the straight line through
    the readings and q = F(BEND_CONF; 1, dof); 1 when it cannot be judged (dof < 2, RSS 0).

    With the ambient free and little curvature seen, k and the ambient are barely identified:
    the fitted k scatters upward (curves that level off early, a late or missing ETA) while the
    present value and slope are well determined, and the crossing time is a steep function of k.
    A 90 % test still calls one bend in ten significant when there is none, and a hard switch
    at any level jumps between the straight and the bent forecast.  Shrinking k by its own
    evidence (the positive-part rule, here at the 99 % point) keeps the bend where the readings
    show it clearly (a hot liquid chilled toward coolant: F in the thousands, w ~ 1) and takes
    the tangent (the lumped curve's limit k -> 0, inside the model) where they do not.  Only the
    point forecast is shrunk: the intervals remain the 90 % profile region of the unshrunk fit.
    """
    if dof < 2 or rss <= 0:
        return 1.0
    s_line, icpt = np.polyfit(d, yc, 1)
    rss_line = float(np.sum((yc - (icpt + s_line * d)) ** 2))
    F = (rss_line - rss) / (rss / dof)
    q = float(f_ppf(BEND_CONF, 1, dof))
    return max(0.0, 1.0 - q / F) if F > 0 else 0.0


def shrunk_eta(now: float, slope: float, k: float, thr: float, limit: str | None) -> float | None:
    """Seconds until the lumped curve through the present value ``now`` with the present
    ``slope`` (per s) and rate ``k`` reaches thr:

        T(x) = now + (slope / k) (1 - e^(-k x)),  ambient now + slope / k;

    k = 0 is its tangent, T(x) = now + slope x.  None if it does not get there."""
    if slope == 0 or (thr - now) / slope <= 0:
        return None
    if limit == "upper" and slope < 0 or limit == "lower" and slope > 0:
        return None
    if k <= 0:
        return float((thr - now) / slope)  # the tangent: now + slope x = thr
    u = k * (thr - now) / slope  # the share of the way to the ambient that thr lies at
    if u >= 1.0:
        return None  # the curve levels off at or before thr
    return float(-math.log1p(-u) / k)
