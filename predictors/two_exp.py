"""Two time constants toward one ambient: a two-node body, fitted by variable projection.

A probe in a container (content and vessel), a sensor board with its own mass, the air of a box
and its load: two heat capacities C1, C2 coupled to each other and to the surroundings,

    C1 dT1/dt = G12 (T2 - T1) + G1a (Ta - T1)
    C2 dT2/dt = G12 (T1 - T2) + G2a (Ta - T2),

a linear system whose solution, read at either node, is

    T(d) = a + b1 e^(-k1 d) + b2 e^(-k2 d),      d = t - t_first,  k1 > k2 > 0,  a = Ta,

with k1, k2 the eigenvalues of the system (the amplitudes take either sign: a lagging start has
them opposite, a vessel soaking up heat the same).  Early cooling sped up by evaporation or
radiation is not linear, but over a forecast's reach it is close to this shape too.

For fixed (k1, k2) the model is linear in (a, b1, b2): every pair on a grid of k is solved at
once from the sums of e_i = e^(-k_i d) (one matrix product), the best pair refined in log k, so
the fit is as cheap as a handful of lumped fits.  A given ambient is a Gaussian prior on a (a
penalty lam (a - a0)^2, lam = sigma^2 / sd^2), as in :mod:`thermeta.predictors.lumped`.

The 90 % interval of the crossing time is the profile likelihood's, as for the lumped model:
for each grid pair the objective is quadratic in theta = (a, b1, b2) with Hessian/2 M, so the
least RSS of a curve through the threshold at time x exceeds the pair's minimum by
(g'theta - thr)^2 / g'M^-1 g, g = (1, e^(-k1 (D + x)), e^(-k2 (D + x))); x is inside when that
stays under the cut for some pair.  The cut's margin is inflated by n / n_eff where the
residuals are correlated (:func:`effective_share`).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from scipy.optimize import brentq
from thermeta.predictors.quantiles import f_ppf

CONF = 0.90
KD_MIN, KD_MAX = 0.02, 60.0  # k * span of the grid: from a slight bend to relaxed in 2 %
N_GRID = 30
MIN_RATIO = 1.5  # k1 / k2 at least this: closer rates are one time constant
REFINE_SIDE = 9  # the refining grids: 9 x 9 pairs ...
REFINE_ROUNDS = 5  # ... in 5 rounds, each a quarter as wide (to 1/1024 of a grid step)
N_PAR = 5


@dataclass
class TwoExpFit:
    """The two-time-constant fit of a window of readings.  Seconds and the readings' unit."""

    ok: bool
    reason: str | None = None
    ambient: float = math.nan
    b1: float = math.nan  # amplitude of the fast mode (k1)
    b2: float = math.nan  # amplitude of the slow mode (k2)
    k1: float = math.nan
    k2: float = math.nan
    t_first: float = math.nan
    t_last: float = math.nan
    rss: float = math.nan
    dof: int = 0
    n: int = 0
    n_prior: int = 0
    sigma: float = math.nan
    residuals: np.ndarray = field(default_factory=lambda: np.zeros(0))
    bounds: tuple[float, float] = (-math.inf, math.inf)
    # the sums the interval needs (kept, so the interval costs no refit)
    _state: dict = field(default_factory=dict, repr=False)

    def curve(self, t: np.ndarray) -> np.ndarray:
        """T(t) = a + b1 e^(-k1 (t - t_first)) + b2 e^(-k2 (t - t_first))."""
        d = np.asarray(t, float) - self.t_first
        return self.ambient + self.b1 * np.exp(-self.k1 * d) + self.b2 * np.exp(-self.k2 * d)

    def slope(self, t: float) -> float:
        """dT/dt at epoch seconds t."""
        d = t - self.t_first
        return float(
            -self.k1 * self.b1 * math.exp(-self.k1 * d) - self.k2 * self.b2 * math.exp(-self.k2 * d)
        )

    @property
    def value_fit_now(self) -> float:
        return float(self.curve(np.array([self.t_last]))[0])


def _gram(E: np.ndarray, yc: np.ndarray):
    """Sums for every k of the grid: Se (m), See (m, m), Sye (m)."""
    return E.sum(1), E @ E.T, E @ yc


def solve_pairs(
    n: int,
    Sy: float,
    Syy: float,
    Se: np.ndarray,
    See: np.ndarray,
    Sye: np.ndarray,
    i: np.ndarray,
    j: np.ndarray,
    lam: float,
    a0: float,
    lo: float,
    hi: float,
):
    """Best (a, b1, b2) and RSS for the pairs (i, j) of the grid: normal equations

        [[n + lam, Se_i, Se_j], [Se_i, See_ii, See_ij], [Se_j, See_ij, See_jj]] theta
            = [Sy + lam a0, Sye_i, Sye_j],

    with a clipped to [lo, hi] (then b solved again with a fixed).  Returns theta (P, 3), rss (P,),
    and the matrices M (P, 3, 3) of the quadratic objective."""
    P = i.size
    M = np.empty((P, 3, 3))
    M[:, 0, 0] = n + (lam if math.isfinite(lam) else 0.0)
    M[:, 0, 1] = M[:, 1, 0] = Se[i]
    M[:, 0, 2] = M[:, 2, 0] = Se[j]
    M[:, 1, 1] = See[i, i]
    M[:, 2, 2] = See[j, j]
    M[:, 1, 2] = M[:, 2, 1] = See[i, j]
    r = np.stack([np.full(P, Sy + lam * a0 if math.isfinite(lam) else Sy), Sye[i], Sye[j]], 1)
    scale = np.sqrt(np.einsum("pii->pi", M))
    Ms = M / scale[:, :, None] / scale[:, None, :]
    Ms = Ms + 1e-12 * np.eye(3)
    theta = np.linalg.solve(Ms, (r / scale)[..., None])[..., 0] / scale
    a = theta[:, 0]
    fixed = (~np.isfinite(a)) | (a < lo) | (a > hi) | (not math.isfinite(lam))
    if fixed.any():
        a_f = np.clip(np.nan_to_num(a[fixed], nan=a0), lo, hi)
        if not math.isfinite(lam):
            a_f = np.full(a_f.shape, min(max(a0, lo), hi))
        M2 = M[fixed][:, 1:, 1:] + 1e-12 * np.eye(2) * M[fixed][:, 1:, 1:].max()
        r2 = r[fixed][:, 1:] - a_f[:, None] * M[fixed][:, 1:, 0]
        b = np.linalg.solve(M2, r2[..., None])[..., 0]
        theta[fixed] = np.column_stack([a_f, b])
    # RSS = Syy - 2 theta.r + theta' M theta (+ lam a0^2 folded into the centred sums)
    quad = np.einsum("pi,pij,pj->p", theta, M, theta)
    rss = Syy - 2 * np.einsum("pi,pi->p", theta, r) + quad
    if math.isfinite(lam) and lam > 0:
        rss = rss + lam * a0 * a0
    rss = np.where(np.isfinite(rss), np.maximum(rss, 0.0), np.inf)
    return theta, rss, M


def effective_share(residuals: np.ndarray) -> float:
    """n_eff / n for residuals with lag-one autocorrelation rho: (1 - rho) / (1 + rho), the
    variance of a mean of AR(1) scatter; 1 for white scatter (rho <= 0)."""
    r = np.asarray(residuals, float)
    if r.size < 8:
        return 1.0
    r = r - r.mean()
    den = float(r @ r)
    if den <= 0:
        return 1.0
    rho = float(r[1:] @ r[:-1]) / den
    rho = min(max(rho, 0.0), 0.98)
    return (1.0 - rho) / (1.0 + rho)


def fit_two_exp(
    t: np.ndarray,
    y: np.ndarray,
    *,
    ambient: float | None = None,
    ambient_sd: float = 0.0,
    bounds: tuple[float, float] | None = None,
    noise_sd: float | None = None,
) -> TwoExpFit:
    """Fit T = a + b1 e^(-k1 d) + b2 e^(-k2 d) to sorted readings; never raises on data."""
    t = np.asarray(t, float)
    y = np.asarray(y, float)
    n = t.size
    n_prior = int(ambient is not None and ambient_sd > 0)
    fixed_a = ambient is not None and ambient_sd <= 0
    n_par = N_PAR - int(fixed_a)
    if n < n_par + 2 - n_prior:
        return TwoExpFit(False, f"too few readings to fit ({n})", n=n)
    D = float(t[-1] - t[0])
    if D <= 0:
        return TwoExpFit(False, "all readings at one instant", n=n)
    d = t - t[0]
    ybar = float(y.mean())
    yc = y - ybar
    spread = max(float(np.ptp(y)), 1e-6)
    if bounds is None:
        bounds = (float(y.min()) - 10 * spread - 10.0, float(y.max()) + 10 * spread + 10.0)
    lo, hi = bounds[0] - ybar, bounds[1] - ybar
    a0 = 0.0 if ambient is None else float(ambient) - ybar
    k = np.geomspace(KD_MIN, KD_MAX, N_GRID) / D
    E = np.exp(-np.outer(k, d))
    Se, See, Sye = _gram(E, yc)
    ii, jj = np.triu_indices(N_GRID, 1)
    keep = k[jj] / k[ii] >= MIN_RATIO  # j is the fast mode (k grows with the index)
    ii, jj = ii[keep], jj[keep]
    sig = noise_sd if noise_sd and noise_sd > 0 else 0.05 * spread
    Sy, Syy = float(yc.sum()), float(yc @ yc)

    def lam_of(s: float) -> float:
        if ambient is None:
            return 0.0
        return math.inf if ambient_sd <= 0 else s * s / ambient_sd**2

    lam = lam_of(sig)
    theta, rss, _ = solve_pairs(n, Sy, Syy, Se, See, Sye, jj, ii, lam, a0, lo, hi)
    best = int(np.argmin(rss))
    lk0 = np.log([k[jj[best]], k[ii[best]]])

    step = math.log(KD_MAX / KD_MIN) / (N_GRID - 1)

    def refine(v: np.ndarray, lam_: float) -> tuple[np.ndarray, float]:
        """Shrinking local grids around the best pair (ln k): REFINE_ROUNDS rounds of a
        REFINE_SIDE x REFINE_SIDE grid, each a quarter of the last one's width (all pairs of a
        round solved at once, the sums of their rates from one matrix product)."""
        u = np.linspace(-1.0, 1.0, REFINE_SIDE)
        du = np.stack(np.meshgrid(u, u, indexing="ij"), -1).reshape(-1, 2)
        width, best_r = step, math.inf
        for _ in range(REFINE_ROUNDS):
            vv = v + width * du
            kk = np.exp(vv)
            fast, slow = (
                np.unique(kk[:, 0], return_inverse=True),
                np.unique(kk[:, 1], return_inverse=True),
            )
            ks = np.concatenate([fast[0], slow[0]])
            s1, s2, s3 = _gram(np.exp(-np.outer(ks, d)), yc)
            i, j = fast[1], fast[0].size + slow[1]
            rr = solve_pairs(n, Sy, Syy, s1, s2, s3, i, j, lam_, a0, lo, hi)[1]
            rr = np.where(kk[:, 0] / kk[:, 1] >= MIN_RATIO, rr, np.inf)
            b = int(np.argmin(rr))
            if rr[b] <= best_r:
                v, best_r = vv[b], float(rr[b])
            width /= 4.0
        return v, best_r

    v = lk0
    for _ in range(2 if n_prior else 1):
        v, r_now = refine(v, lam)
        if n_prior:
            sig = max(math.sqrt(r_now / max(n + n_prior - n_par, 1)), 1e-9)
            lam = lam_of(sig)
    k1, k2 = (float(x) for x in np.exp(v))
    e = np.exp(-np.outer([k1, k2], d))
    s1, s2, s3 = _gram(e, yc)
    th, rr, _ = solve_pairs(n, Sy, Syy, s1, s2, s3, np.array([0]), np.array([1]), lam, a0, lo, hi)
    a, b1, b2 = (float(x) for x in th[0])
    fit_y = a + b1 * e[0] + b2 * e[1]
    dof = max(n + n_prior - n_par, 1)
    r_hat = float(rr[0])
    out = TwoExpFit(
        True,
        ambient=a + ybar,
        b1=b1,
        b2=b2,
        k1=k1,
        k2=k2,
        t_first=float(t[0]),
        t_last=float(t[-1]),
        rss=r_hat,
        dof=dof,
        n=n,
        n_prior=n_prior,
        sigma=math.sqrt(r_hat / dof),
        residuals=yc - fit_y,
        bounds=(lo + ybar, hi + ybar),
    )
    out._state = dict(
        k=k,
        Se=Se,
        See=See,
        Sye=Sye,
        Sy=Sy,
        Syy=Syy,
        ii=ii,
        jj=jj,
        lam=lam,
        a0=a0,
        lo=lo,
        hi=hi,
        ybar=ybar,
        D=D,
        d=d,
        yc=yc,
    )
    return out


def crossing(
    fit: TwoExpFit, thr: float, limit: str | None = None, reach: float = 1e3
) -> float | None:
    """Seconds from the newest reading until the fitted curve first reaches thr (0 when the
    present fitted value is past it on the limit's side), None when it does not within ``reach``
    spans of the readings."""
    D = fit.t_last - fit.t_first
    now = fit.value_fit_now
    if limit == "upper" and now >= thr or limit == "lower" and now <= thr:
        return 0.0
    if now == thr:
        return 0.0
    x = np.concatenate([[0.0], np.geomspace(1e-4 * D, reach * D, 400)])
    g = fit.curve(fit.t_last + x) - thr
    hit = np.flatnonzero(np.sign(g[1:]) != np.sign(g[0]))
    if hit.size == 0:
        return None
    i = int(hit[0])
    going_up = g[i + 1] > g[i]
    if limit == "upper" and not going_up or limit == "lower" and going_up:
        return None
    f = lambda z: float(fit.curve(np.array([fit.t_last + z]))[0] - thr)
    return float(brentq(f, x[i], x[i + 1], xtol=1e-6 * max(x[i + 1], 1.0)))


def _pair_rss(fit: TwoExpFit, v: np.ndarray) -> tuple:
    """Sums and best (a, b1, b2), RSS and M for the (fast, slow) pairs exp(v) (rows of v)."""
    s = fit._state
    kk = np.exp(np.asarray(v, float))
    ks = kk.ravel()
    E = np.exp(-np.outer(ks, s["d"]))
    Se, See, Sye = _gram(E, s["yc"])
    m = kk.shape[0]
    i, j = 2 * np.arange(m), 2 * np.arange(m) + 1
    th, rr, M = solve_pairs(
        fit.n, s["Sy"], s["Syy"], Se, See, Sye, i, j, s["lam"], s["a0"], -np.inf, np.inf
    )
    rr = np.where(kk[:, 0] / kk[:, 1] >= MIN_RATIO, rr, np.inf)
    return kk[:, 0], kk[:, 1], th, rr, M


def _region_pairs(fit: TwoExpFit, margin: float, m: int = 15):
    """Pairs of ln k spread over the region {RSS <= RSS_min + margin}: a grid along the
    principal axes of the RSS's curvature in (ln k1, ln k2) at the fit (the region is a thin
    tilted ellipse when the two rates trade off), scaled to the region's half-widths and
    widened while its edge is still inside."""
    v0 = np.log([fit.k1, fit.k2])
    h = 1e-3
    steps = np.array([[0, 0], [h, 0], [-h, 0], [0, h], [0, -h], [h, h], [-h, -h]])
    r = _pair_rss(fit, v0 + steps)[3]
    H = np.empty((2, 2))
    H[0, 0] = (r[1] + r[2] - 2 * r[0]) / h**2
    H[1, 1] = (r[3] + r[4] - 2 * r[0]) / h**2
    H[0, 1] = H[1, 0] = (r[5] + r[6] - 2 * r[0]) / (2 * h**2) - 0.5 * (H[0, 0] + H[1, 1])
    lam, Q = np.linalg.eigh(H if np.all(np.isfinite(H)) else np.eye(2))
    half = np.sqrt(2.0 * margin / np.maximum(lam, 1e-12 * max(abs(lam).max(), 1e-300)))
    half = np.minimum(half, 4.0)
    u = np.linspace(-1.0, 1.0, m)
    grid = np.stack(np.meshgrid(u, u, indexing="ij"), -1).reshape(-1, 2)
    for scale in (1.5, 3.0, 6.0):
        v = v0 + (grid * half * scale) @ Q.T
        out = _pair_rss(fit, v)
        edge = np.abs(grid).max(1) >= 0.999
        if not (out[3][edge] <= fit.rss + margin).any():
            break
    return out


def eta_interval(
    fit: TwoExpFit, thr: float, inflate: float = 1.0, reach: float = 1e3
) -> tuple[float | None, float | None]:
    """The 90 % profile-likelihood interval of the crossing time (see the module docstring):
    (early, late), None for an end that is open (early: 0 is a bound; late: no bound within
    ``reach`` spans).  ``inflate`` >= 1 widens the cut's margin (correlated residuals).

    The pairs searched: the coarse grid of the fit, and a local grid around the fitted pair
    widened until its edge lies outside the region (or spans +-4 in ln k)."""
    s = fit._state
    if not s:
        return None, None
    D = s["D"]
    cut = fit.rss + fit.rss * f_ppf(CONF, 1, fit.dof) / fit.dof * max(inflate, 1.0)
    n = fit.n
    lam, a0 = s["lam"], s["a0"]
    parts = []
    for kk, Se, See, Sye, i, j in ((s["k"], s["Se"], s["See"], s["Sye"], s["jj"], s["ii"]),):
        parts.append(
            (
                kk[i],
                kk[j],
                *solve_pairs(n, s["Sy"], s["Syy"], Se, See, Sye, i, j, lam, a0, -np.inf, np.inf),
            )
        )
    parts.append(_region_pairs(fit, cut - fit.rss))
    kf = np.concatenate([p[0] for p in parts])
    ks = np.concatenate([p[1] for p in parts])
    theta = np.concatenate([p[2] for p in parts])
    rss = np.concatenate([p[3] for p in parts])
    M = np.concatenate([p[4] for p in parts])
    inside = rss <= cut
    if not inside.any():
        return None, None
    theta, rss, M, kf, ks = theta[inside], rss[inside], M[inside], kf[inside], ks[inside]
    if not math.isfinite(lam):
        # a fixed ambient: only (b1, b2) are free
        Minv = np.zeros_like(M)
        Minv[:, 1:, 1:] = np.linalg.pinv(M[:, 1:, 1:])
    else:
        Minv = np.linalg.pinv(M)
    x = np.concatenate([[0.0], np.geomspace(1e-3 * D, reach * D, 300)])
    g = np.stack(
        [np.ones((kf.size, x.size)), np.exp(-np.outer(kf, D + x)), np.exp(-np.outer(ks, D + x))],
        -1,
    )  # (P, X, 3)
    pred = np.einsum("pxi,pi->px", g, theta) - (thr - s["ybar"])
    var = np.maximum(np.einsum("pxi,pij,pxj->px", g, Minv, g), 1e-300)
    delta = (cut - rss)[:, None]
    ok = pred**2 <= delta * var  # grid instants some curve of the pair's ellipsoid crosses at
    # between grid instants: each pair's own crossing x*, widened by the band its ellipsoid
    # allows there, |pred| <= sqrt(delta var), i.e. +- sqrt(delta var) / |slope| in time
    flip = np.sign(pred[:, 1:]) != np.sign(pred[:, :1])
    crosses = flip.any(1)
    i = np.argmax(flip, 1)
    rows = np.arange(pred.shape[0])
    p0, p1 = pred[rows, i], pred[rows, i + 1]
    with np.errstate(divide="ignore", invalid="ignore"):
        w = np.where(p0 != p1, p0 / (p0 - p1), 0.0)
        xs = x[i] + w * (x[i + 1] - x[i])
        slope = np.abs(p1 - p0) / np.maximum(x[i + 1] - x[i], 1e-300)
        band = np.sqrt(delta[:, 0] * var[rows, i]) / np.maximum(slope, 1e-300)
    lo_p = np.where(crosses, np.maximum(xs - band, 0.0), np.inf)
    hi_p = np.where(crosses, xs + band, -np.inf)
    cols = ok.any(0)
    if cols.any():
        lo_p = np.append(lo_p, x[np.argmax(cols)])
        hi_p = np.append(hi_p, x[x.size - 1 - int(np.argmax(cols[::-1]))])
    if not np.isfinite(lo_p).any():
        return None, None  # no curve the readings allow reaches the threshold within reach
    early = float(np.min(lo_p))
    late = float(np.max(hi_p))
    # a curve the readings allow that does not get there (levels off short, or only beyond
    # the reach) means crossings without a late bound
    if not crosses.all() or (cols.any() and cols[-1]) or late >= x[-1]:
        return early, None
    return early, late
