"""The batch's estimator: ``fit_lumped`` for many items at once, by variable projection.

For item i with readings y (centred on their mean) at times d since its first, and the curve
y = a + b e^(-k d), a and b are linear given k: from the sums Se = sum e^(-k d),
See = sum e^(-2 k d) and Sye = sum y e^(-k d), the best (a, b) and the RSS follow in closed form
(``lumped_profile.solve_fixed_k``; a given ambient with doubt sd adds lam (a - a0)^2 to the RSS,
lam = sigma^2 / sd^2; a fixed one holds a = a0).  k is searched on ONE grid of k D shared by all
items (the same 56 points ``fit_lumped`` scans: e^(-k d) = e^(-kD u), u = d / D_i), so the sums
for every item and grid point are one (N, K, n) block and Sye one product; golden-section steps
in ln k then refine each item's best point to ``fit_lumped``'s tolerance.  The 90 % profile
intervals of k and the ambient come from the RSS on each item's own grid (the shared one plus a
fine one around k_hat) against the cut RSS (1 + F(CONF; 1, dof) / dof).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy.special import fdtri
from thermeta.predictors.combined_forecast import RICH_MIN
from thermeta.predictors.lumped import BEND_CONF, CONF, KD_MAX, KD_MIN

KD_GRID = np.geomspace(KD_MIN, KD_MAX, 56)  # fit_lumped's grid, in units of 1 / span
LOG_STEP = float(np.log(KD_GRID[1] / KD_GRID[0]))
GOLDEN_TOL = 1e-6  # in ln k: fit_lumped's xatol
FINE = np.linspace(-4.0, 4.0, 61)  # the interval's fine grid around ln k_hat, in half-widths
BLOCK_CELLS = 100_000  # rows x k x readings of e^(-k d) at a time (800 kB: in the cache)


@dataclass
class _Sums:
    """fit_lumped's sums for N items and K values of k each (weights: 1 a reading, 0 padding)."""

    k: np.ndarray  # (N, K)
    n: np.ndarray  # (N, 1)
    Sy: np.ndarray
    Syy: np.ndarray
    Se: np.ndarray  # (N, K)
    See: np.ndarray
    Sye: np.ndarray


def _sums(d: np.ndarray, yc: np.ndarray, W: np.ndarray | None, k: np.ndarray) -> _Sums:
    """Se, See, Sye for each item's k row: E = e^(-k d) as (rows, K, n) blocks of about
    BLOCK_CELLS each (a block stays in the cache; one (N, K, n) block of a chunk was 100 MB,
    allocated afresh at every call), Sye a batched product (``W`` None: every reading weighs 1,
    no padding)."""
    N, K = k.shape
    n_r = d.shape[1]
    Se, See, Sye = np.empty((N, K)), np.empty((N, K)), np.empty((N, K))
    step = max(1, BLOCK_CELLS // max(K * n_r, 1))
    for a in range(0, N, step):
        b = min(N, a + step)
        E = np.multiply(k[a:b, :, None], d[a:b, None, :])
        np.negative(E, out=E)
        np.exp(E, out=E)
        if W is not None:
            E *= W[a:b, None, :]
        Se[a:b] = E.sum(axis=2)
        Sye[a:b] = np.matmul(E, yc[a:b, :, None])[..., 0]
        E *= E
        See[a:b] = E.sum(axis=2)
    if W is not None:
        n = W.sum(axis=1, keepdims=True)
        Sy, Syy = (W * yc).sum(axis=1, keepdims=True), (W * yc * yc).sum(axis=1, keepdims=True)
    else:
        n = np.full((N, 1), float(n_r))
        Sy, Syy = yc.sum(axis=1, keepdims=True), (yc * yc).sum(axis=1, keepdims=True)
    return _Sums(k, n, Sy, Syy, Se, See, Sye)


def _grid_sums(d: np.ndarray, D: np.ndarray, yc: np.ndarray, W: np.ndarray | None) -> _Sums:
    """The sums on the shared grid (k = KD_GRID / D per row).  Rows whose readings lie at the
    same fractions u = d / D of their span (a probe reporting on a fixed cadence) share
    E = e^(-kD u): it is computed once for them, and Sye is one matrix product."""
    k = KD_GRID[None, :] / D[:, None]
    if W is not None or d.shape[0] < 2:
        return _sums(d, yc, W, k)
    U = d / D[:, None]
    if not np.array_equal(U, np.broadcast_to(U[0], U.shape)):
        return _sums(d, yc, W, k)
    E = np.exp(-KD_GRID[:, None] * U[0][None, :])  # (K, n), the same for every row
    N, n = d.shape
    return _Sums(
        k,
        np.full((N, 1), float(n)),
        yc.sum(axis=1, keepdims=True),
        (yc * yc).sum(axis=1, keepdims=True),
        np.broadcast_to(E.sum(axis=1), (N, KD_GRID.size)).copy(),
        np.broadcast_to((E * E).sum(axis=1), (N, KD_GRID.size)).copy(),
        yc @ E.T,
    )


def _solve(s: _Sums, lam: np.ndarray, a0: np.ndarray, lo: np.ndarray | None, hi: np.ndarray | None):
    """lumped_profile.solve_fixed_k per row: best (a, b) and the RSS for each k; lam = inf holds
    a at a0; lo, hi = None leaves a unclipped."""
    fixed = np.isinf(lam)
    lam_f = np.where(fixed, 0.0, lam)
    det = (s.n + lam_f) * s.See - s.Se**2
    a = (s.See * (s.Sy + lam_f * a0) - s.Se * s.Sye) / det
    a = np.nan_to_num(a, nan=0.0) + np.where(np.isnan(a), a0, 0.0)
    a = np.where(fixed, a0, a)
    if lo is not None:
        a = np.clip(a, lo, hi)
    b = (s.Sye - a * s.Se) / s.See
    r = s.Syy - 2 * a * s.Sy - 2 * b * s.Sye + s.n * a * a + 2 * a * b * s.Se + b * b * s.See
    r = r + np.where(fixed | (lam_f <= 0), 0.0, lam_f * (a - a0) ** 2)
    r = np.where(np.isnan(r), np.inf, np.maximum(r, 0.0))
    return a, b, r


@dataclass
class _Fits:
    k: np.ndarray
    a: np.ndarray
    b: np.ndarray
    rss: np.ndarray
    lam: np.ndarray
    edge: np.ndarray
    grid: _Sums  # the sums on the shared grid (kD / D per row), reused by the intervals


def _best_k(
    d, yc, W: np.ndarray | None, grid: _Sums, lam, a0, lo, hi
) -> tuple[np.ndarray, np.ndarray]:
    """ln k of the least RSS and whether it lies at the grid's edge: the shared grid's best
    point, then fit_lumped's bounded Brent search (``minimize_scalar(method="bounded")``,
    xatol 1e-6) between its neighbours, every row at once (:func:`_brent`); the grid point
    stays where the search found no less."""

    def rss(x: np.ndarray, at: np.ndarray) -> np.ndarray:
        s = _sums(d[at], yc[at], None if W is None else W[at], np.exp(x[:, None]))
        return _solve(s, lam[at], a0[at], lo[at], hi[at])[2][:, 0]

    N = d.shape[0]
    lk_grid = np.log(grid.k)
    r = _solve(grid, lam, a0, lo, hi)[2]
    i = np.argmin(r, axis=1)
    edge = (i == 0) | (i == KD_GRID.size - 1)
    rows = np.arange(N)
    x, best_r = lk_grid[rows, i], r[rows, i]
    xf, ff = _brent(rss, x - LOG_STEP, x + LOG_STEP)
    return np.where(ff <= best_r, xf, x), edge


def _brent(f, a: np.ndarray, b: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """scipy's bounded Brent minimiser (golden-section steps, parabolic ones where they are
    acceptable; xatol GOLDEN_TOL) run for many rows at once: each row keeps its own state, and
    ``f(x, rows)`` is called on the rows still searching only.  Returns each row's x and f(x)."""
    sqrt_eps = math.sqrt(2.2e-16)
    gm = 0.5 * (3.0 - math.sqrt(5.0))
    a, b = a.astype(float).copy(), b.astype(float).copy()
    fulc = a + gm * (b - a)
    nfc, xf = fulc.copy(), fulc.copy()
    rat = np.zeros_like(a)
    e = np.zeros_like(a)
    fx = f(xf, np.arange(a.size))
    ffulc, fnfc = fx.copy(), fx.copy()
    for _ in range(500):
        xm = 0.5 * (a + b)
        tol1 = sqrt_eps * np.abs(xf) + GOLDEN_TOL / 3.0
        tol2 = 2.0 * tol1
        act = np.flatnonzero(np.abs(xf - xm) > (tol2 - 0.5 * (b - a)))
        if not act.size:
            break
        A, B, X, XM, T1, T2 = a[act], b[act], xf[act], xm[act], tol1[act], tol2[act]
        FX, NFC, FULC, FNFC, FFULC = fx[act], nfc[act], fulc[act], fnfc[act], ffulc[act]
        E, RAT = e[act], rat[act]
        try_par = np.abs(E) > T1
        r_ = (X - NFC) * (FX - FFULC)
        q_ = (X - FULC) * (FX - FNFC)
        p_ = (X - FULC) * q_ - (X - NFC) * r_
        q_ = 2.0 * (q_ - r_)
        p_ = np.where(q_ > 0.0, -p_, p_)
        q_ = np.abs(q_)
        r_old = E
        E = np.where(try_par, RAT, E)
        ok = try_par & (np.abs(p_) < np.abs(0.5 * q_ * r_old)) & (p_ > q_ * (A - X))
        ok &= p_ < q_ * (B - X)
        with np.errstate(all="ignore"):
            par = p_ / q_
        near = ((X + par - A) < T2) | ((B - X - par) < T2)
        si_m = np.sign(XM - X) + ((XM - X) == 0)
        par = np.where(near, T1 * si_m, par)
        E = np.where(ok, E, np.where(X >= XM, A - X, B - X))
        RAT = np.where(ok, par, gm * E)
        si = np.sign(RAT) + (RAT == 0)
        U = X + si * np.maximum(np.abs(RAT), T1)
        FU = f(U, act)
        better = FU <= FX
        A = np.where(better & (U >= X), X, np.where(~better & (U < X), U, A))
        B = np.where(better & (U < X), X, np.where(~better & (U >= X), U, B))
        to_nfc = ~better & ((FU <= FNFC) | (NFC == X))
        to_fulc = ~better & ~to_nfc & ((FU <= FFULC) | (FULC == X) | (FULC == NFC))
        FULC_n = np.where(better | to_nfc, NFC, np.where(to_fulc, U, FULC))
        FFULC_n = np.where(better | to_nfc, FNFC, np.where(to_fulc, FU, FFULC))
        NFC_n = np.where(better, X, np.where(to_nfc, U, NFC))
        FNFC_n = np.where(better, FX, np.where(to_nfc, FU, FNFC))
        a[act], b[act], e[act], rat[act] = A, B, E, RAT
        fulc[act], ffulc[act], nfc[act], fnfc[act] = FULC_n, FFULC_n, NFC_n, FNFC_n
        xf[act], fx[act] = np.where(better, U, X), np.where(better, FU, FX)
    return xf, fx


def _fit(T, Y, W, amb, amb_sd, lo_b, hi_b, noise_sd) -> tuple[_Fits, dict]:
    """fit_lumped for every row (weights W), without the threshold's parts."""
    n = W.sum(axis=1)
    t0 = T[:, 0]
    last = np.maximum((W > 0).cumsum(axis=1).argmax(axis=1), 0)
    rows = np.arange(T.shape[0])
    D = T[rows, last] - t0
    d = (T - t0[:, None]) * W
    ybar = (W * Y).sum(axis=1) / n
    yc = (Y - ybar[:, None]) * W
    Ym = np.where(W > 0, Y, np.nan)
    Wp = None if bool(np.all(W == 1.0)) else W  # None: no padding, no weights to apply
    spread = np.maximum(np.nanmax(Ym, axis=1) - np.nanmin(Ym, axis=1), 1e-6)
    lo = np.where(np.isnan(lo_b), np.nanmin(Ym, axis=1) - 10 * spread - 10.0, lo_b) - ybar
    hi = np.where(np.isnan(hi_b), np.nanmax(Ym, axis=1) + 10 * spread + 10.0, hi_b) - ybar
    given = ~np.isnan(amb)
    a0 = np.where(given, amb - ybar, 0.0)
    prior = given & (amb_sd > 0)
    n_par = np.where(given & (amb_sd <= 0), 2, 3)
    dof = np.maximum(n + prior - n_par, 1)
    col = lambda v: v[:, None]  # noqa: E731 - one row's scalar against its k row
    lam = np.where(given & (amb_sd <= 0), np.inf, 0.0)
    sig = np.where(noise_sd > 0, noise_sd, 0.1 * spread)
    grid = _grid_sums(d, D, yc, Wp)  # the same for every lam
    for _ in range(2 if prior.any() else 1):
        lam = np.where(prior, sig**2 / np.where(prior, amb_sd, 1.0) ** 2, lam)
        lk, edge = _best_k(d, yc, Wp, grid, col(lam), col(a0), col(lo), col(hi))
        r = _solve(_sums(d, yc, Wp, np.exp(lk[:, None])), col(lam), col(a0), col(lo), col(hi))[2]
        sig = np.where(prior, np.maximum(np.sqrt(r[:, 0] / dof), 1e-9), sig)
    k = np.exp(lk)
    a, b, r = (v[:, 0] for v in _solve(_sums(d, yc, Wp, k[:, None]), *map(col, (lam, a0, lo, hi))))
    geo = dict(n=n, D=D, d=d, yc=yc, Wp=Wp, ybar=ybar, lo=lo, hi=hi, a0=a0, dof=dof, n_par=n_par)
    return _Fits(k, a, b, r, lam, edge, grid), geo


def _profile_interval(x: np.ndarray, prof: np.ndarray, cut: np.ndarray, x_hat: np.ndarray):
    """lumped_profile.interval_from_profile per row: the ends of {prof <= cut} around x_hat,
    NaN for an end at the grid's edge."""
    N, K = x.shape
    rows = np.arange(N)
    ok = prof <= cut[:, None]
    i0 = np.argmin(np.abs(x - x_hat[:, None]), axis=1)
    i0 = np.where(ok[rows, i0], i0, np.argmin(prof, axis=1))
    j = np.arange(K)[None, :]
    lo_i = np.where(~ok & (j < i0[:, None]), j, -1).max(axis=1) + 1
    hi_i = np.where(~ok & (j > i0[:, None]), j, K).min(axis=1) - 1

    def cross(i_in, i_out):
        p_in, p_out = prof[rows, i_in], prof[rows, i_out]
        w = (cut - p_in) / (p_out - p_in)
        moved = x[rows, i_in] + w * (x[rows, i_out] - x[rows, i_in])
        return np.where(~np.isfinite(p_out) | (p_out == p_in), x[rows, i_in], moved)

    lo = np.where(lo_i == 0, np.nan, cross(lo_i, np.maximum(lo_i - 1, 0)))
    hi = np.where(hi_i == K - 1, np.nan, cross(hi_i, np.minimum(hi_i + 1, K - 1)))
    none = ~ok.any(axis=1)
    return np.where(none, x_hat, lo), np.where(none, x_hat, hi)


@dataclass
class _Ambient:
    """The ambient of each row as forecast() takes it: given (NaN: fitted), its sd, its bounds
    (NaN: none stated), and the readings' noise sd the fit starts its weights from."""

    value: np.ndarray
    sd: np.ndarray
    lo: np.ndarray
    hi: np.ndarray
    noise_sd: np.ndarray


def _analyse(
    T: np.ndarray,
    Y: np.ndarray,
    W: np.ndarray,
    amb: _Ambient,
    inflate: bool = False,
    intervals: bool = True,
) -> dict:
    """fit_lumped's threshold-free part for every row: the fit, the residuals, the bend weight
    and the straight line, k's and the ambient's intervals and the grid for the crossing's
    (``intervals`` False: not yet; :func:`_intervals` adds them, to some rows only if need be).
    ``inflate``: the intervals' cut margin times n / n_eff where the residuals' lag-one
    correlation is beyond the white-noise band (``combined_forecast.inflation``, what
    ``forecast()`` refits with); ``infl`` and ``lag`` per row in the result."""
    fits, g = _fit(T, Y, W, amb.value, amb.sd, amb.lo, amb.hi, amb.noise_sd)
    k, a, b, rss, dof = fits.k, fits.a, fits.b, fits.rss, g["dof"]
    d, yc, n = g["d"], g["yc"], g["n"]
    fit_y = (a[:, None] + b[:, None] * np.exp(-k[:, None] * d)) * W
    res = (yc - fit_y) * W
    lag, infl = _inflation(res, W, n)
    if not inflate:
        infl = np.ones_like(infl)
    # the bend weight (lumped.bend_weight) against the straight line through the readings
    dbar = (W * d).sum(axis=1) / n
    dm = (d - dbar[:, None]) * W
    sxx = (dm * dm).sum(axis=1)
    slope = (dm * yc).sum(axis=1) / sxx
    icpt = -slope * dbar  # the readings are centred on their mean
    line_res = (yc - icpt[:, None] - slope[:, None] * d) * W
    rss_line = (line_res * line_res).sum(axis=1)
    F = (rss_line - rss) / (rss / dof)
    q99 = fdtri(1.0, np.maximum(dof, 1), BEND_CONF)
    w = np.where(F > 0, np.maximum(0.0, 1.0 - q99 / F), 0.0)
    w = np.where((dof < 2) | (rss <= 0) | ~np.isnan(amb.value), 1.0, w)
    A = dict(
        g,
        fits=fits,
        fit_y=fit_y,
        res=res,
        lag=lag,
        infl=infl,
        sigma=np.sqrt(rss / dof),
        w=w,
        slope=slope,
        icpt=icpt,
        rss_line=rss_line,
        sxx=sxx,
        ambient=a + g["ybar"],
        cut=rss * (1.0 + infl * fdtri(1.0, dof, CONF) / dof),
    )
    return _intervals(A) if intervals else A


def _intervals(A: dict) -> dict:
    """The profile intervals of :func:`_analyse`'s fits: k's and the ambient's, and the grid,
    sums and margins the crossings' intervals are taken over (``lumped_profile.eta_sets``)."""
    fits, cut, k, lam = A["fits"], A["cut"], A["fits"].k, A["fits"].lam
    s, k_all, r_k, a_u, b_u, delta = _grid(fits, A, cut)
    k_lo, k_hi = _profile_interval(k_all, r_k, cut, k)
    fixed = np.isinf(lam)
    lam_f = np.where(fixed, 0.0, lam)[:, None]
    m11 = s.See / ((s.n + lam_f) * s.See - s.Se**2)
    wa = np.sqrt(np.maximum(np.nan_to_num(np.maximum(delta, 0.0) * m11, nan=0.0), 0.0))
    sel = (delta >= 0) & np.isfinite(wa)
    sel = np.where(sel.any(axis=1, keepdims=True), sel, k_all == k[:, None])
    ambient, ybar = A["ambient"], A["ybar"]
    amb_lo = np.maximum(np.where(sel, a_u - wa, np.inf).min(axis=1), A["lo"]) + ybar
    amb_hi = np.minimum(np.where(sel, a_u + wa, -np.inf).max(axis=1), A["hi"]) + ybar
    return dict(
        A,
        s=s,
        k_all=k_all,
        a_u=a_u,
        b_u=b_u,
        delta=delta,
        k_lo=k_lo,
        k_hi=k_hi,
        amb_lo=np.where(fixed, ambient, amb_lo),
        amb_hi=np.where(fixed, ambient, amb_hi),
    )


def _take(A: dict, rows: np.ndarray) -> dict:
    """:func:`_analyse`'s result for some of its rows only."""

    def part(v):
        if isinstance(v, np.ndarray) and v.ndim >= 1:
            return v[rows]
        if isinstance(v, _Fits | _Sums):
            return type(v)(**{f: part(getattr(v, f)) for f in v.__dataclass_fields__})
        return v

    return {key: part(v) for key, v in A.items()}


def _inflation(res: np.ndarray, W: np.ndarray, n: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Each row's lag-one correlation of its residuals and n / n_eff = (1 + rho) / (1 - rho)
    where it is beyond the white-noise band 2 / sqrt(n) (rho at most 0.98), 1 otherwise
    (``combined_forecast.inflation`` per row; padded readings left out)."""
    rc = (res - ((W * res).sum(axis=1) / n)[:, None]) * W
    lag = (rc[:, 1:] * rc[:, :-1]).sum(1) / np.maximum((rc * rc).sum(1), 1e-300)
    rho = np.clip(lag, 0.0, 0.98)
    clear = (n >= RICH_MIN) & (lag > 2.0 / np.sqrt(n))
    return lag, np.where(clear, (1.0 + rho) / (1.0 - rho), 1.0)


def _grid(fits: _Fits, g: dict, cut: np.ndarray):
    """lumped_profile.add_intervals's grid per row: the shared coarse grid, a fine one around
    k_hat as wide as the RSS's curvature in ln k says, and k_hat; the sums on it, the profile
    RSS, the unclipped (a, b) per k and the margin to the cut inside the region (-1 outside)."""
    k, lam = fits.k, fits.lam
    d, yc, W = g["d"], g["yc"], g["Wp"]
    ab = (lam[:, None], g["a0"][:, None], g["lo"][:, None], g["hi"][:, None])
    lk = np.log(k)
    r3 = _solve(_sums(d, yc, W, np.exp(lk[:, None] + np.array([-0.01, 0.0, 0.01]))), *ab)[2]
    curv = (r3[:, 0] + r3[:, 2] - 2 * r3[:, 1]) / 0.01**2
    room = np.maximum(2 * (cut - fits.rss), 0.0) / np.where(curv > 0, curv, 1.0)
    hw = np.clip(np.where(curv > 0, np.sqrt(room), 3.0), 1e-5, 3.0)
    fine = _sums(
        d, yc, W, np.concatenate([np.exp(lk[:, None] + FINE * hw[:, None]), k[:, None]], 1)
    )
    g0 = fits.grid
    order = np.argsort(np.concatenate([g0.k, fine.k], axis=1), axis=1)

    def joined(a: np.ndarray, b: np.ndarray) -> np.ndarray:
        return np.take_along_axis(np.concatenate([a, b], axis=1), order, axis=1)

    s = _Sums(
        joined(g0.k, fine.k),
        g0.n,
        g0.Sy,
        g0.Syy,
        joined(g0.Se, fine.Se),
        joined(g0.See, fine.See),
        joined(g0.Sye, fine.Sye),
    )
    k_all = s.k
    r_k = _solve(s, *ab)[2]
    inside = r_k <= cut[:, None]
    inside = np.where(inside.any(axis=1, keepdims=True), inside, k_all == k[:, None])
    a_u, b_u, r_u = _solve(s, ab[0], ab[1], None, None)
    delta = np.where(inside, cut[:, None] - r_u, -1.0)
    return s, k_all, r_k, a_u, b_u, delta
