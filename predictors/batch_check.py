"""The batch's self-check, in arrays: ``combined_forecast.self_check`` for many items at once.

One exponential fitted to the first half of an item's readings forecasts when the newest level
(their mean over the last 4 % of the span) is reached; outside that forecast's interval widened
to about 99.9 %, the readings say the curve does not go on as it did and the item goes the
per-item way.  The first halves are fitted together (``batch_fit._analyse``, weights 0 on the
rest), and the crossing of the newest level, its interval (``lumped_profile.eta_sets`` over each
row's grid) and the verdict are computed for all rows at once: ``Prepared.crossing`` and the
scalar verdict, row by row, with NaN for None.
"""

from __future__ import annotations

from typing import Any

import numpy as np
from thermeta.predictors.batch_fit import _Ambient, _analyse, _intervals, _take
from thermeta.predictors.combined_forecast import (
    CHECK_FLOOR,
    CHECK_MIN,
    CHECK_ORIGIN,
    CHECK_WIDEN,
)
from thermeta.predictors.lumped import TREND_REACH
from thermeta.predictors.lumped_profile import Sums, eta_sets


def all_ends(A: dict, rows: np.ndarray, thr_c: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
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


def self_check(T: np.ndarray, Y: np.ndarray, amb: _Ambient, wanted: np.ndarray) -> np.ndarray:
    """combined_forecast.self_check per row.  True: doubt.  Only the ``wanted`` rows (those not
    flagged already) are checked, on the columns their first halves use; the crossing's
    interval is computed only for the rows whose first-half ETA misses the newest level's time
    by more than self_check lets pass without one (half the averaging window, or 5 %)."""
    N, n = T.shape
    span = T[:, -1] - T[:, 0]
    m = (T <= (T[:, :1] + CHECK_ORIGIN * span[:, None])).sum(axis=1)
    half = 0.02 * span
    recent = T >= (T[:, -1] - 2 * half)[:, None]
    level = (Y * recent).sum(1) / recent.sum(1)
    actual = T[:, -1] - half - T[np.arange(N), m - 1]
    out = np.zeros(N, bool)
    use = np.flatnonzero((m >= CHECK_MIN) & (n - m >= 3) & wanted)
    if not use.size:
        return out
    m, lv, actual, half = m[use], level[use], actual[use], half[use]
    cols = int(m.max())
    W = (np.arange(cols)[None, :] < m[:, None]).astype(float)
    sub = _Ambient(*(v[use] for v in (amb.value, amb.sd, amb.lo, amb.hi, amb.noise_sd)))
    A = _analyse(T[use, :cols], Y[use, :cols], W, sub, intervals=False)
    eta, now = _eta(A, lv, m - 1, np.isnan(sub.value))
    with np.errstate(all="ignore"):
        asked = (actual > 0) & (np.abs(lv - now) >= 1e-12)
        near = ~np.isnan(eta) & (
            (np.abs(actual - eta) <= half)
            | ((eta > 0) & (np.abs(np.log(actual / eta)) <= CHECK_FLOOR))
        )
        rest = np.flatnonzero(asked & ~near)
        if not rest.size:
            return out
        lo, hi = _interval(_intervals(_take(A, rest)), eta[rest], lv[rest])
        out[use[rest]] = _doubts(eta[rest], lo, hi, actual[rest])
    return out


def _eta(A: dict, level: np.ndarray, last: np.ndarray, fitted: np.ndarray):
    """Prepared.crossing's ETA of each row's level (no limit), in arrays (NaN for None), and the
    fit's value now."""
    f = A["fits"]
    rows = np.arange(level.size)
    ybar, k, amp, a, D, w = A["ybar"], f.k, f.b, A["ambient"], A["D"], A["w"]
    now = A["fit_y"][rows, last] + ybar
    thr_c, now_c = level - ybar, now - ybar
    with np.errstate(all="ignore"):
        # lumped.crossing_eta, limit None
        side_now, side_inf = now - level, a - level
        eta = np.where(
            (side_now * side_inf < 0) & (k > 0),
            np.log((now - a) / (level - a)) / k,
            np.where(((a + amp) - level) * side_now < 0, 0.0, np.nan),
        )
        eta = np.where(side_now == 0, 0.0, eta)
        # a fitted ambient: the bend kept ahead, or the straight trend over a level-off
        slope_now = -k * amp * np.exp(-k * D)
        eta_w = _shrunk(now_c, slope_now, w * k, thr_c)
        bent = fitted & (eta > 0) & (w < 1.0) & ~np.isnan(eta_w)
        eta_t = _shrunk(A["icpt"] + A["slope"] * D, A["slope"], np.zeros_like(k), thr_c)
        trend = fitted & np.isnan(eta) & (w == 0.0) & (eta_t <= TREND_REACH * D)
        return np.where(bent, eta_w, np.where(trend, eta_t, eta)), now


def _interval(A: dict, eta: np.ndarray, level: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Prepared.crossing's interval of the ETA (NaN for None) over each row's grid."""
    rows = np.arange(level.size)
    lo, hi = all_ends(A, rows, level - A["ybar"])  # NaN: no curve inside the region crosses
    hi = np.where(np.isinf(hi), np.nan, hi)
    has = ~np.isnan(eta)
    lo = np.where(has, np.minimum(lo, eta), lo)  # (NaN stays: an empty region)
    hi = np.where(has & ~np.isnan(hi), np.maximum(hi, eta), hi)
    zero = eta == 0.0
    return np.where(zero, 0.0, lo), np.where(zero, 0.0, hi)


def _shrunk(now, slope, k, thr):
    """lumped.shrunk_eta per row, no limit (NaN: it does not get there)."""
    x = (thr - now) / slope
    tangent = k <= 0
    eta = np.where(tangent, x, -np.log1p(-k * x) / np.where(tangent, 1.0, k))
    ok = (slope != 0) & (x > 0) & (tangent | (k * x < 1.0))
    return np.where(ok, eta, np.nan)


def _widen(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """combined_forecast._widen per row."""
    return np.where((a > 0) & (b > 0), np.abs(np.log(b / a)) * (CHECK_WIDEN - 1.0), 0.0)


def _doubts(eta: np.ndarray, lo: np.ndarray, hi: np.ndarray, actual: np.ndarray) -> np.ndarray:
    """combined_forecast.self_check's verdict on the first half's forecast, per row (NaN: None)."""
    never = np.isnan(lo) | ~np.isfinite(lo) | (lo > actual)
    late = ~np.isnan(hi) & (actual > hi * np.exp(_widen(eta, hi)))
    lo_w = lo * np.exp(-_widen(lo, eta))
    hi_w = np.where(np.isnan(hi), np.inf, hi * np.exp(_widen(eta, hi)))
    outside = ~((lo_w <= actual) & (actual <= hi_w))
    return np.where(np.isnan(eta), never, np.where(~(lo > 0), late, outside))
