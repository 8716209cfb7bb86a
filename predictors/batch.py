"""Many items' lumped forecasts at once: the refit round's fast path.

The per-item chain (``forecast()``: cleaning, the regime search, ``fit_lumped`` with its robust
refit, the two-time-constant test, the self-check, the interval) costs a few milliseconds an
item.  Most items of a site, most of the time, are one exponential with white scatter, and for
them that chain ends in ``fill_lumped`` of one ``fit_lumped``.  Here that case is computed for
a whole round in arrays, and every item it does not hold for is *flagged* and goes the
per-item way:

1. :func:`prepare` (threshold-free, vectorised over items of one length): the reading step and
   the local-line scatter of ``cleaning.clean`` (a spike or a dropout: flagged), then the fit of
   ``fit_lumped`` by variable projection for all items together: the closed-form sums on ONE
   shared grid of k D (the same 56 points ``fit_lumped`` scans; for item i, k = kD / D_i, so
   e^(-k d) = e^(-kD u) with u = d / D_i), the sums ``Sye`` as one matrix product, three
   parabolic steps in ln k from the grid's best point; k's and the ambient's 90 % profile
   intervals on each item's own fine grid, all items in one product again.  Then the screens,
   each a reason to go the per-item way: too few readings, readings not strictly in time,
   a spike (the Hampel filter's or the robust refit's test), a possible change of surroundings
   (the newest readings off the curve, beyond its noise band), a poor fit (scatter about the
   curve well above the readings' own local scatter, or residuals correlated from one reading
   to the next: a second time constant, a door, a drifting room, a sawtooth), a given ambient
   the readings contradict, the first half's fit that did not foresee the newest level (the
   self-check), a fit at the grid's edge, readings that do not move.
2. :meth:`Prepared.forecast` (per threshold and side, scalar): the crossing, the bend kept ahead
   (``fit_lumped``'s rule), the crossing's interval (``lumped_profile.eta_sets`` on the item's
   grid), then the same ``fill_lumped`` and notes as the per-item path.

Not here (the caller sends them the per-item way): a measured ambient, the core-probe shapes and
``auto``, a learned prior, ``detect_regimes=False``.  The per-item path is the reference:
``tests/test_batch.py`` holds the two to the same ETA within 1 % and the same outcome.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from enum import StrEnum
from typing import Any

import numpy as np
from numpy.lib.stride_tricks import sliding_window_view
from scipy.special import fdtri
from thermeta.predictors.cleaning import MAD_TO_SD
from thermeta.predictors.combined_forecast import (
    CHECK_MIN,
    CHECK_ORIGIN,
    RICH_MIN,
    _widen,
    note_ambient_agreement,
)
from thermeta.predictors.context import AmbientMode, Context
from thermeta.predictors.forecast import MIN_POINTS, MIN_POINTS_KNOWN
from thermeta.predictors.lumped import (
    BEND_CONF,
    CONF,
    KD_MAX,
    KD_MIN,
    TREND_REACH,
    LumpedFit,
    crossing_eta,
    shrunk_eta,
)
from thermeta.predictors.lumped_forecast import fill_lumped
from thermeta.predictors.lumped_profile import Sums, eta_sets
from thermeta.predictors.result import Forecast
from thermeta.predictors.wording import DisplayUnit, showing

KD_GRID = np.geomspace(KD_MIN, KD_MAX, 56)  # fit_lumped's grid, in units of 1 / span
LOG_STEP = float(np.log(KD_GRID[1] / KD_GRID[0]))
GOLDEN_TOL = 1e-6  # in ln k: fit_lumped's xatol
FINE = np.linspace(-4.0, 4.0, 61)  # the interval's fine grid around ln k_hat, in half-widths
CHUNK_CELLS = 4_000_000  # items x grid x readings per product (about 32 MB of doubles)
HALF = 5  # the local line's half-window (cleaning.local_line_residuals)
HAMPEL_SIGMA = 6.0  # cleaning.clean's spike test
OUTLIER_SIGMA = 4.0  # lumped_forecast's robust-refit test
GAP_STEPS = 4.0  # cleaning.GAP_STEPS
POOR_FIT = 1.5  # scatter about the curve / the readings' local scatter beyond which: per item
BAND_SIGMA = 3.0  # the newest readings' mean residual, in its standard errors
NEWEST = 5  # readings that make "the newest"
SHAPE_CONF = 0.99  # the residuals' cubic test (_shape_left)
QUANTA = (1.0, 0.5, 0.2, 0.1, 0.05, 0.01)  # cleaning.reading_step's grids


class Flag(StrEnum):
    """Why an item goes the per-item way."""

    TOO_FEW = "too_few"
    NOT_IN_TIME = "not_in_time"
    GAP = "gap"
    SPIKE = "spike"
    CHANGE = "change"
    POOR_FIT = "poor_fit"
    DOUBT = "doubt"
    EDGE = "edge"
    NO_TREND = "no_trend"


@dataclass(frozen=True)
class Series:
    """One item's readings for the batch (sorted by time, from the store) and its ambient:
    ``ambient`` given (degC) or None (fitted); ``ambient_sd`` its doubt (1 sd);
    ``ambient_within`` a stated bound (then sd = within / sqrt 3, as ``forecast()`` takes it)."""

    t: np.ndarray
    y: np.ndarray
    ambient: float | None = None
    ambient_sd: float = 2.5
    ambient_within: float | None = None
    min_points: int | None = None
    thresholds: tuple[float, ...] = ()  # the crossings' intervals to compute with the batch


@dataclass
class Prepared:
    """One item's fit, ready for a forecast per threshold (:meth:`forecast`)."""

    s: Series
    fit: LumpedFit
    ctx: Context
    sums: Sums  # on the interval's grid k_all (centred readings)
    a_u: np.ndarray
    b_u: np.ndarray
    delta: np.ndarray
    lam: float
    ybar: float
    span_s: float
    w: float  # fit_lumped's bend weight (fitted ambient), 1 otherwise
    line: tuple[float, float]  # the straight line through the centred readings: (slope, icpt)
    still: bool  # lumped_forecast.no_trend: the readings do not move
    # per threshold (degC): the crossing's interval ends over the grid, computed with the batch
    # (lumped_profile.eta_sets' nanmin of the early ends, nanmax of the late ends; NaN: empty)
    bounds: dict[float, tuple[float, float]] = field(default_factory=dict)

    def forecast(
        self, threshold: float, limit: str | None = None, shown: DisplayUnit | None = None
    ) -> Forecast | Flag:
        """The forecast ``forecast()`` makes of these readings for ``threshold``, or a flag."""
        with np.errstate(all="ignore"), showing(shown):
            return self._forecast(float(threshold), limit)

    def crossing(self, threshold: float, limit: str | None) -> LumpedFit:
        """fit_lumped's threshold-dependent part: the crossing (with the bend kept ahead, or the
        straight trend over a level-off, for a fitted ambient) and its interval."""
        f, ybar, D = self.fit, self.ybar, self.span_s
        fit = LumpedFit(**{k: getattr(f, k) for k in _FIT_FIELDS})
        thr = threshold - ybar
        fit.eta_s, fit.direction = crossing_eta(
            fit.value_fit_now,
            fit.ambient,
            fit.k_per_s,
            threshold,
            value_start=fit.ambient + fit.amplitude,
            limit=limit,
        )
        now_c = fit.value_fit_now - ybar
        if self.ctx.ambient is None and fit.eta_s is not None and fit.eta_s > 0:
            slope_now = -fit.k_per_s * fit.amplitude * math.exp(-fit.k_per_s * D)
            eta_w = shrunk_eta(now_c, slope_now, self.w * fit.k_per_s, thr, limit)
            if self.w < 1.0 and eta_w is not None:
                fit.eta_s, fit.bend_kept, fit.straight = eta_w, self.w, self.w == 0.0
        elif self.ctx.ambient is None and fit.eta_s is None and self.w == 0.0:
            slope, icpt = self.line
            eta_t = shrunk_eta(icpt + slope * D, slope, 0.0, thr, limit)
            if eta_t is not None and eta_t <= TREND_REACH * D:
                fit.eta_s, fit.bend_kept, fit.straight = eta_t, 0.0, True
                fit.direction = "rising" if slope > 0 else "falling"
                fit.trend_now = (icpt + slope * D + ybar, slope)
        if fit.eta_s == 0.0:
            fit.eta_lo_s = fit.eta_hi_s = 0.0
            return fit
        ends = self.bounds.get(threshold)
        if ends is None:
            lo, hi = eta_sets(self.sums, self.a_u, self.b_u, self.delta, thr, D, self.lam)
            ends = _ends(lo, hi)
        if math.isnan(ends[0]):
            fit.eta_lo_s = fit.eta_hi_s = None
            return fit
        fit.eta_lo_s = ends[0]
        top = ends[1]
        fit.eta_hi_s = None if math.isinf(top) else top
        if fit.eta_s is not None:
            fit.eta_lo_s = min(fit.eta_lo_s, fit.eta_s)
            if fit.eta_hi_s is not None:
                fit.eta_hi_s = max(fit.eta_hi_s, fit.eta_s)
        return fit

    def _forecast(self, threshold: float, limit: str | None) -> Forecast | Flag:
        ctx = self.ctx
        fit = self.crossing(threshold, limit)
        if (
            fit.eta_s is None
            and ctx.ambient is not None
            and ctx.ambient_sd > 0
            and abs(fit.ambient - ctx.ambient) > ctx.ambient_sd
        ):
            return Flag.DOUBT  # lumped_forecast's "never" against a given ambient
        t, y = self.s.t, self.s.y
        fc = Forecast(
            threshold=threshold,
            model="lumped",
            ambient_mode=str(ctx.mode),
            n_points=int(t.size),
            t_last=float(t[-1]),
            value_now=float(y[-1]),
            regime_start=float(t[0]),
            lag_factor_j=1.0,
        )
        fill_lumped(fc, fit, ctx.with_readings(t, y, threshold=threshold, limit=limit))
        if fc.eta_s and self.still:
            return Flag.NO_TREND
        note_ambient_agreement(fc, ctx, fit.ambient)
        return fc


def _ends(lo: np.ndarray, hi: np.ndarray) -> tuple[float, float]:
    if np.all(np.isnan(lo)):
        return math.nan, math.nan
    return float(np.nanmin(lo)), float(np.nanmax(hi))


def _all_ends(A: dict, rows: np.ndarray, thr_c: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """lumped_profile.eta_sets for many (row, threshold) pairs at once: each pair's earliest and
    latest crossing over the row's grid (NaN where no curve inside the region crosses)."""
    s = A["s"]
    sub = Sums(s.k[rows], A["n"][rows, None], 0.0, 0.0, s.Se[rows], s.See[rows], s.Sye[rows])
    args: tuple[Any, Any, Any] = (thr_c[:, None], A["D"][rows, None], A["fits"].lam[rows, None])
    lo, hi = eta_sets(sub, A["a_u"][rows], A["b_u"][rows], A["delta"][rows], *args)
    empty = np.all(np.isnan(lo), axis=1)
    with np.errstate(all="ignore"):
        lo_min, hi_max = (
            np.nanmin(np.where(empty[:, None], 0.0, lo), axis=1),
            np.nanmax(np.where(empty[:, None], 0.0, hi), axis=1),
        )
    return np.where(empty, np.nan, lo_min), np.where(empty, np.nan, hi_max)


_FIT_FIELDS = (
    "ok",
    "k_per_s",
    "ambient",
    "value_fit_now",
    "t_first",
    "t_last",
    "amplitude",
    "rss",
    "dof",
    "n_par",
    "sigma",
    "k_lo",
    "k_hi",
    "ambient_lo",
    "ambient_hi",
    "n",
    "bounds",
)


def prepare(series: list[Series]) -> list[Prepared | Flag]:
    """Each item's fit (or why it goes the per-item way), items of one length at a time."""
    out: list[Prepared | Flag | None] = [None] * len(series)
    groups: dict[int, list[int]] = {}
    for i, s in enumerate(series):
        need = s.min_points or (MIN_POINTS if s.ambient is None else MIN_POINTS_KNOWN)
        if s.t.size < max(need, RICH_MIN, 2 * HALF + 1):
            out[i] = Flag.TOO_FEW
        else:
            groups.setdefault(int(s.t.size), []).append(i)
    for n, idx in groups.items():
        step = max(1, CHUNK_CELLS // (n * (KD_GRID.size + FINE.size + 1)))
        for a in range(0, len(idx), step):
            part = idx[a : a + step]
            with np.errstate(all="ignore"):
                done = _prepare_group([series[i] for i in part])
            for i, p in zip(part, done):
                out[i] = p
    return [p if p is not None else Flag.TOO_FEW for p in out]


# -- the vectorised steps ----------------------------------------------------------------------


def _quantum(Y: np.ndarray) -> np.ndarray:
    """cleaning.reading_step per row: the coarsest decimal grid that holds 95 % of the values."""
    q = np.zeros(Y.shape[0])
    for step in reversed(QUANTA):  # finest first, so the coarsest that holds ends up set
        holds = (np.abs(Y / step - np.round(Y / step)) < 1e-6).mean(axis=1) > 0.95
        q = np.where(holds, step, q)
    return q


def _local_residuals(T: np.ndarray, Y: np.ndarray) -> np.ndarray:
    """cleaning.local_line_residuals per row (readings of one length >= 11)."""
    n = T.shape[1]
    w = 2 * HALF + 1
    idx = np.clip(np.arange(n) - w // 2, 0, n - w)
    tw = sliding_window_view(T, w, axis=1)[:, idx]  # (N, n, w)
    yw = sliding_window_view(Y, w, axis=1)[:, idx]
    h = w // 2
    lt, rt = np.median(tw[..., :h], axis=2), np.median(tw[..., -h:], axis=2)
    ly, ry = np.median(yw[..., :h], axis=2), np.median(yw[..., -h:], axis=2)
    dt = rt - lt
    slope = np.where(dt > 0, (ry - ly) / np.where(dt > 0, dt, 1.0), 0.0)
    level = np.median(yw - slope[..., None] * (tw - T[..., None]), axis=2)
    return Y - level


def _robust_sd(R: np.ndarray) -> np.ndarray:
    med = np.median(R, axis=1, keepdims=True)
    return MAD_TO_SD * np.median(np.abs(R - med), axis=1)


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


def _sums(d: np.ndarray, yc: np.ndarray, W: np.ndarray, k: np.ndarray) -> _Sums:
    """Se, See, Sye for each item's k row: E = e^(-k d) as an (N, K, n) block, Sye one product."""
    E = np.exp(-k[:, :, None] * d[:, None, :]) * W[:, None, :]
    return _Sums(
        k,
        W.sum(axis=1, keepdims=True),
        (W * yc).sum(axis=1, keepdims=True),
        (W * yc * yc).sum(axis=1, keepdims=True),
        E.sum(axis=2),
        (E * E).sum(axis=2),
        np.einsum("ikn,in->ik", E, yc),
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


def _best_k(d, yc, W, grid: _Sums, lam, a0, lo, hi) -> tuple[np.ndarray, np.ndarray]:
    """ln k of the least RSS and whether it lies at the grid's edge: the shared grid's best
    point, then golden-section steps within its neighbours to fit_lumped's tolerance, for all
    rows at once (parabolic steps were tried: where the ambient meets its bound the profile has
    a kink, and they stopped up to 1 % off in k there, moving the interval's ends by more)."""

    def rss(x: np.ndarray) -> np.ndarray:
        return _solve(_sums(d, yc, W, np.exp(x[:, None])), lam, a0, lo, hi)[2][:, 0]

    N = d.shape[0]
    lk_grid = np.log(grid.k)
    r = _solve(grid, lam, a0, lo, hi)[2]
    i = np.argmin(r, axis=1)
    edge = (i == 0) | (i == KD_GRID.size - 1)
    rows = np.arange(N)
    x, best_r = lk_grid[rows, i], r[rows, i]
    left, right = x - LOG_STEP, x + LOG_STEP
    # golden section on the best grid point's neighbours
    lo_x, hi_x = left, right
    g = (math.sqrt(5.0) - 1.0) / 2.0
    x1, x2 = hi_x - g * (hi_x - lo_x), lo_x + g * (hi_x - lo_x)
    f1, f2 = rss(x1), rss(x2)
    while np.max(hi_x - lo_x) > GOLDEN_TOL:
        go_left = f1 <= f2
        hi_x = np.where(go_left, x2, hi_x)
        lo_x = np.where(go_left, lo_x, x1)
        x2n = np.where(go_left, x1, lo_x + g * (hi_x - lo_x))
        x1n = np.where(go_left, hi_x - g * (hi_x - lo_x), x2)
        f2n = np.where(go_left, f1, np.nan)
        f1n = np.where(go_left, np.nan, f2)
        new = np.where(go_left, x1n, x2n)
        fn = rss(new)
        x1, x2 = x1n, x2n
        f1, f2 = np.where(go_left, fn, f1n), np.where(go_left, f2n, fn)
    xm = 0.5 * (lo_x + hi_x)
    rm = rss(xm)
    better = rm <= best_r
    return np.where(better, xm, x), edge


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
    grid = _sums(d, yc, W, KD_GRID[None, :] / D[:, None])  # the same for every lam
    for _ in range(2 if prior.any() else 1):
        lam = np.where(prior, sig**2 / np.where(prior, amb_sd, 1.0) ** 2, lam)
        lk, edge = _best_k(d, yc, W, grid, col(lam), col(a0), col(lo), col(hi))
        r = _solve(_sums(d, yc, W, np.exp(lk[:, None])), col(lam), col(a0), col(lo), col(hi))[2]
        sig = np.where(prior, np.maximum(np.sqrt(r[:, 0] / dof), 1e-9), sig)
    k = np.exp(lk)
    a, b, r = (v[:, 0] for v in _solve(_sums(d, yc, W, k[:, None]), *map(col, (lam, a0, lo, hi))))
    geo = dict(n=n, D=D, d=d, yc=yc, ybar=ybar, lo=lo, hi=hi, a0=a0, dof=dof, n_par=n_par)
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


def _analyse(T: np.ndarray, Y: np.ndarray, W: np.ndarray, amb: _Ambient) -> dict:
    """fit_lumped's threshold-free part for every row: the fit, the residuals, the bend weight
    and the straight line, k's and the ambient's intervals and the grid for the crossing's."""
    fits, g = _fit(T, Y, W, amb.value, amb.sd, amb.lo, amb.hi, amb.noise_sd)
    k, a, b, rss, lam, dof = fits.k, fits.a, fits.b, fits.rss, fits.lam, g["dof"]
    d, yc, n = g["d"], g["yc"], g["n"]
    fit_y = (a[:, None] + b[:, None] * np.exp(-k[:, None] * d)) * W
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
    cut = rss * (1.0 + fdtri(1.0, dof, CONF) / dof)
    s, k_all, r_k, a_u, b_u, delta = _grid(fits, g, W, cut)
    k_lo, k_hi = _profile_interval(k_all, r_k, cut, k)
    fixed = np.isinf(lam)
    lam_f = np.where(fixed, 0.0, lam)[:, None]
    m11 = s.See / ((s.n + lam_f) * s.See - s.Se**2)
    wa = np.sqrt(np.maximum(np.nan_to_num(np.maximum(delta, 0.0) * m11, nan=0.0), 0.0))
    sel = (delta >= 0) & np.isfinite(wa)
    sel = np.where(sel.any(axis=1, keepdims=True), sel, k_all == k[:, None])
    ambient = a + g["ybar"]
    amb_lo = np.maximum(np.where(sel, a_u - wa, np.inf).min(axis=1), g["lo"]) + g["ybar"]
    amb_hi = np.minimum(np.where(sel, a_u + wa, -np.inf).max(axis=1), g["hi"]) + g["ybar"]
    return dict(
        g,
        fits=fits,
        fit_y=fit_y,
        res=(yc - fit_y) * W,
        sigma=np.sqrt(rss / dof),
        w=w,
        slope=slope,
        icpt=icpt,
        rss_line=rss_line,
        sxx=sxx,
        s=s,
        k_all=k_all,
        a_u=a_u,
        b_u=b_u,
        delta=delta,
        k_lo=k_lo,
        k_hi=k_hi,
        ambient=ambient,
        amb_lo=np.where(fixed, ambient, amb_lo),
        amb_hi=np.where(fixed, ambient, amb_hi),
    )


def _rows(A: dict, series: list[Series], T: np.ndarray, amb: _Ambient, q, still) -> list:
    """Each row's Prepared from _analyse's arrays."""
    f, s = A["fits"], A["s"]
    last = np.maximum(A["n"].astype(int) - 1, 0)
    out = []
    for i, sr in enumerate(series):
        ybar = float(A["ybar"][i])
        fit = LumpedFit(
            True,
            k_per_s=float(f.k[i]),
            ambient=float(A["ambient"][i]),
            amplitude=float(f.b[i]),
            t_first=float(T[i, 0]),
            t_last=float(T[i, last[i]]),
            value_fit_now=float(A["fit_y"][i, last[i]] + ybar),
            rss=float(f.rss[i]),
            dof=int(A["dof"][i]),
            n_par=int(A["n_par"][i]),
            sigma=float(A["sigma"][i]),
            n=int(A["n"][i]),
            bounds=(float(A["lo"][i] + ybar), float(A["hi"][i] + ybar)),
            k_lo=0.0 if np.isnan(A["k_lo"][i]) else float(A["k_lo"][i]),
            k_hi=None if np.isnan(A["k_hi"][i]) else float(A["k_hi"][i]),
            ambient_lo=float(A["amb_lo"][i]),
            ambient_hi=float(A["amb_hi"][i]),
        )
        given = not np.isnan(amb.value[i])
        ctx = Context(
            threshold=math.nan,
            limit=None,
            mode=AmbientMode.KNOWN if given else AmbientMode.FITTED,
            t=sr.t,
            y=sr.y,
            ambient=sr.ambient if given else None,
            ambient_sd=float(amb.sd[i]) if given else 0.0,
            ambient_within=sr.ambient_within if given else None,
            noise_sd=float(amb.noise_sd[i]),
            quantum=float(q[i]),
        )
        row = Sums(
            A["k_all"][i],
            int(A["n"][i]),
            float(s.Sy[i, 0]),
            float(s.Syy[i, 0]),
            s.Se[i],
            s.See[i],
            s.Sye[i],
        )
        out.append(
            Prepared(
                sr,
                fit,
                ctx,
                row,
                A["a_u"][i],
                A["b_u"][i],
                A["delta"][i],
                float(f.lam[i]),
                ybar,
                float(A["D"][i]),
                float(A["w"][i]),
                (float(A["slope"][i]), float(A["icpt"][i])),
                bool(still[i]),
            )
        )
    return out


def _prepare_group(series: list[Series]) -> list[Prepared | Flag]:
    T = np.stack([s.t for s in series]).astype(float)
    Y = np.stack([s.y for s in series]).astype(float)
    N, n = T.shape
    flags: list[Flag | None] = [None] * N

    def flag(mask: Any, why: Flag) -> None:
        for i in np.flatnonzero(mask):
            flags[i] = flags[i] or why

    finite = np.isfinite(T).all(1) & np.isfinite(Y).all(1)
    flag(~finite | (np.diff(T, axis=1) <= 0).any(1), Flag.NOT_IN_TIME)
    T = np.where(np.isfinite(T), T, 0.0)
    Y = np.where(np.isfinite(Y), Y, 0.0)
    # cleaning.clean: the step, the local scatter, spikes and dropouts
    q = _quantum(Y)
    ptp = np.ptp(Y, axis=1)
    R = _local_residuals(T, Y)
    sd = _robust_sd(R) / 0.99
    floor = np.maximum(np.maximum(q, 1e-3 * ptp), 1e-9)
    flag((np.abs(R) > HAMPEL_SIGMA * np.maximum(sd, floor)[:, None]).any(1), Flag.SPIKE)
    dt = np.diff(T, axis=1)
    flag((dt > GAP_STEPS * np.median(dt, axis=1, keepdims=True)).any(1), Flag.GAP)
    noise_sd = np.maximum(sd, q / math.sqrt(12.0))
    # the ambient as forecast() takes it
    value = np.array([np.nan if s.ambient is None else s.ambient for s in series], float)
    within = np.array([np.nan if s.ambient_within is None else s.ambient_within for s in series])
    amb_sd = np.array([s.ambient_sd for s in series], float)
    amb_sd = np.where(np.isnan(within), amb_sd, within / math.sqrt(3.0))
    amb = _Ambient(value, amb_sd, value - within, value + within, noise_sd)
    A = _analyse(T, Y, np.ones_like(T), amb)
    f, res, sigma = A["fits"], A["res"], A["sigma"]
    flag(f.edge, Flag.EDGE)
    # the robust refit's test (lumped_forecast): a reading far off the fitted curve
    med = np.median(res, axis=1, keepdims=True)
    scale = np.maximum(_robust_sd(res), np.maximum(np.maximum(q, noise_sd), 1e-3 * ptp))
    flag((np.abs(res - med) > OUTLIER_SIGMA * scale[:, None]).any(1), Flag.SPIKE)
    # a poor fit: scatter about the curve well above the readings' own, or correlated residuals
    rc = res - res.mean(axis=1, keepdims=True)
    lag = (rc[:, 1:] * rc[:, :-1]).sum(1) / np.maximum((rc * rc).sum(1), 1e-300)
    flag(lag > 2.0 / math.sqrt(n), Flag.POOR_FIT)
    rms = np.sqrt((res * res).mean(axis=1))
    flag(rms > POOR_FIT * noise_sd, Flag.POOR_FIT)
    flag(_shape_left(res, A["d"] / A["D"][:, None]), Flag.POOR_FIT)
    # the newest readings off the curve: the surroundings may have changed
    newest = res[:, -NEWEST:].mean(axis=1)
    flag(np.abs(newest) > BAND_SIGMA * sigma / math.sqrt(NEWEST), Flag.CHANGE)
    # a given ambient pulled more than 2 sd away (lumped_forecast._contradicts)
    given = ~np.isnan(value)
    flag(given & (amb_sd > 0) & (np.abs(A["ambient"] - value) > 2.0 * amb_sd), Flag.DOUBT)
    # lumped_forecast.no_trend: the straight trend's rise within twice its standard error
    s2 = np.maximum(np.maximum(A["rss_line"] / max(n - 2, 1), noise_sd**2), q**2 / 12.0)
    D = A["D"]
    still = np.abs(A["slope"]) * D < np.maximum(2.0 * np.sqrt(s2 / A["sxx"]) * D, q)
    flag(_self_check(T, Y, amb, q), Flag.DOUBT)
    rows = _rows(A, series, T, amb, q, still)
    pairs = [(i, th) for i, sr in enumerate(series) if flags[i] is None for th in sr.thresholds]
    if pairs:
        at = np.array([i for i, _ in pairs])
        ths = np.array([th for _, th in pairs], float)
        lo, hi = _all_ends(A, at, ths - A["ybar"][at])
        for (i, th), a, b in zip(pairs, lo, hi):
            rows[i].bounds[float(th)] = (float(a), float(b))
    return [fl if fl is not None else r for fl, r in zip(flags, rows)]


def _shape_left(res: np.ndarray, u: np.ndarray) -> np.ndarray:
    """Whether a smooth shape is left in the residuals: a cubic in time (u = d / span) fitted to
    them takes out more than its F(SHAPE_CONF; 3, n - 7) point says chance would.  The stand-in
    for the per-item two-time-constant test (combined_forecast.shape_test), which a batch cannot
    afford: measured on 300 seeded lumped items (bench_refit's), it flagged the one item that test
    sent to the combined forecast, and 6 others."""
    n = res.shape[1]
    X = np.stack([np.ones_like(u), 2 * u - 1, (2 * u - 1) ** 2, (2 * u - 1) ** 3], axis=2)
    beta = np.linalg.solve(
        np.einsum("nij,nik->njk", X, X), np.einsum("nij,ni->nj", X, res)[..., None]
    )[..., 0]
    left = res - np.einsum("nij,nj->ni", X, beta)
    rss, rss_left = (res * res).sum(1), (left * left).sum(1)
    F = (rss - rss_left) / 3.0 / np.maximum(rss_left / (n - 7), 1e-300)
    return F > fdtri(3.0, n - 7, SHAPE_CONF)


def _grid(fits: _Fits, g: dict, W: np.ndarray, cut: np.ndarray):
    """lumped_profile.add_intervals's grid per row: the shared coarse grid, a fine one around
    k_hat as wide as the RSS's curvature in ln k says, and k_hat; the sums on it, the profile
    RSS, the unclipped (a, b) per k and the margin to the cut inside the region (-1 outside)."""
    k, lam = fits.k, fits.lam
    d, yc = g["d"], g["yc"]
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


def _self_check(T: np.ndarray, Y: np.ndarray, amb: _Ambient, q: np.ndarray) -> np.ndarray:
    """combined_forecast.self_check per row: one exponential fitted to the first half of the
    readings (weights 0 on the rest) forecast the newest level outside its own interval widened
    to about 99.9 %.  True: doubt."""
    N, n = T.shape
    span = T[:, -1] - T[:, 0]
    m = (T <= (T[:, :1] + CHECK_ORIGIN * span[:, None])).sum(axis=1)
    half = 0.02 * span
    recent = T >= (T[:, -1] - 2 * half)[:, None]
    level = (Y * recent).sum(1) / recent.sum(1)
    actual = T[:, -1] - half - T[np.arange(N), m - 1]
    usable = (m >= CHECK_MIN) & (n - m >= 3)
    out = np.zeros(N, bool)
    if not usable.any():
        return out
    W = (np.arange(n)[None, :] < m[:, None]).astype(float)
    A = _analyse(T, Y, W, amb)
    dummy = [Series(T[i], Y[i]) for i in range(N)]
    rows = _rows(A, dummy, T, amb, q, np.zeros(N, bool))
    at = np.flatnonzero(usable)
    lo, hi = _all_ends(A, at, level[at] - A["ybar"][at])
    for i, a, b in zip(at, lo, hi):
        rows[i].bounds[float(level[i])] = (float(a), float(b))
    for i in at:
        p = rows[i]
        if actual[i] <= 0 or abs(level[i] - p.fit.value_fit_now) < 1e-12:
            continue
        fit = p.crossing(float(level[i]), None)
        out[i] = _doubts(fit.eta_s, fit.eta_lo_s, fit.eta_hi_s, float(actual[i]))
    return out


def _doubts(eta: float | None, lo: float | None, hi: float | None, actual: float) -> bool:
    """combined_forecast.self_check's verdict on the first half's forecast of the newest level."""
    if eta is None:
        return lo is None or not math.isfinite(lo) or lo > actual
    if lo is None or not lo > 0:
        return hi is not None and actual > hi * math.exp(_widen(eta, hi))
    lo_w = lo * math.exp(-_widen(lo, eta))
    hi_w = math.inf if hi is None else hi * math.exp(_widen(eta, hi))
    return not lo_w <= actual <= hi_w
