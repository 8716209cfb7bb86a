"""Regime changes: find when the surroundings last changed, so the fit uses only the data since.

A change of ambient (a door opened then closed, a compressor restarting, chiller water switched)
bends the curve: dT/dt = -k (T - Ta) jumps with Ta.  One lumped curve then fits badly.  The search:

1. gate: if one lumped fit already explains the readings to their own noise level, there is no
   change (cheap, and it keeps the search off healthy noise);
2. a thermostat's sawtooth (a healthy fridge cycling) is recognised by repeated reversals of
   the local slope; the window is then kept whole, unless the newest monotone run is much longer
   than the usual runs (the unit stopped cycling);
3. otherwise binary segmentation on the tail: the split that lowers the RSS of two lumped fits the
   most, kept when the gain beats a BIC-style penalty; repeated on the part after the split.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
from thermeta.predictors.lumped import fit_lumped, quick_rss

MIN_REGIME_POINTS = 12
RssFn = Callable[[int, int], float]


@dataclass
class Regime:
    start_index: int
    n_changes: int
    cycling: bool
    note: str | None = None


def _rss(t: np.ndarray, y: np.ndarray) -> float:
    return quick_rss(t, y)


def _exact_rss(t: np.ndarray, y: np.ndarray) -> float:
    f = fit_lumped(t, y, float(y[-1]), intervals=False)
    return f.rss if f.ok else math.inf


def slope_runs(t: np.ndarray, y: np.ndarray, noise_sd: float, half: int = 8) -> list[tuple[int, int, int]]:
    """Monotone runs (start, end, sign) of the local slope, with signs only where the slope is
    clearly non-zero (|slope| > 3 se of a local straight line)."""
    n = t.size
    if n < 2 * half + 1:
        return []
    lo = np.clip(np.arange(n) - half, 0, n - 2 * half - 1)
    idx = lo[:, None] + np.arange(2 * half + 1)[None, :]
    tw, yw = t[idx], y[idx]
    tc = tw - tw.mean(axis=1, keepdims=True)
    sxx = (tc * tc).sum(axis=1)
    slope = (tc * (yw - yw.mean(axis=1, keepdims=True))).sum(axis=1) / np.where(sxx > 0, sxx, 1)
    se = max(noise_sd, 1e-9) / np.sqrt(np.where(sxx > 0, sxx, np.inf))
    sign = np.where(slope > 3 * se, 1, np.where(slope < -3 * se, -1, 0))
    runs: list[tuple[int, int, int]] = []
    for i in np.flatnonzero(sign):
        s = int(sign[i])
        if runs and runs[-1][2] == s:
            runs[-1] = (runs[-1][0], int(i), s)
        else:
            runs.append((int(i), int(i), s))
    return runs


def find_regime(t: np.ndarray, y: np.ndarray, noise_sd: float, *, min_points: int = MIN_REGIME_POINTS,
                max_changes: int = 4, rss: RssFn | None = None, exact: RssFn | None = None,
                fit_sigma: float | None = None, n_params: int = 3) -> Regime:
    """Index where the current regime starts (0 = the whole window).

    rss / exact: RSS of the model on a slice (i0, i1) of the readings, a quick one to rank the
    splits and an exact one to test the best (default: the fitted-ambient lumped curve);
    fit_sigma: the residual sd of the model on the whole window (default: computed here).
    """
    n = t.size
    if n < 2 * min_points:
        return Regime(0, 0, False)
    rss = rss or (lambda i0, i1: _rss(t[i0:i1], y[i0:i1]))
    exact = exact or (lambda i0, i1: _exact_rss(t[i0:i1], y[i0:i1]))
    if fit_sigma is None:
        full = fit_lumped(t, y, float(y[-1]), intervals=False)
        if not full.ok:
            return Regime(0, 0, False)
        fit_sigma = full.sigma
    sig = max(noise_sd, 1e-6)
    if fit_sigma <= 1.5 * sig:
        return Regime(0, 0, False)
    runs = slope_runs(t, y, sig)
    if len(runs) >= 4:
        # cycling: keep the window whole unless the newest run outlasts the usual ones
        last = runs[-1]
        same = [r for r in runs[:-1] if r[2] == last[2]]
        dur = lambda r: t[r[1]] - t[r[0]]
        if not same or dur(last) <= 2.0 * max(dur(r) for r in same) or last[1] < n - 3:
            return Regime(0, len(runs) - 1, True, "the readings cycle (a thermostat?); fitted the whole window")
        return Regime(max(runs[-2][1], 0), len(runs) - 1, True,
                      "the readings stopped cycling; fitted the newest run only")
    start, changes = 0, 0
    while changes < max_changes and n - start >= 2 * min_points:
        m = n - start
        cands = start + np.unique(np.linspace(min_points, m - min_points, 14).astype(int))
        scores = np.array([rss(start, j) + rss(j, n) for j in cands])
        i = int(np.argmin(scores))
        # refine between the neighbouring candidates
        fine = np.unique(np.linspace(cands[max(i - 1, 0)], cands[min(i + 1, cands.size - 1)],
                                     9).astype(int))
        fine = fine[(fine >= start + min_points) & (fine <= n - min_points)]
        j_best, best = int(cands[i]), float(scores[i])
        if fine.size:
            fs = np.array([rss(start, j) + rss(j, n) for j in fine])
            if fs.min() < best:
                j_best = int(fine[np.argmin(fs)])
        # the quick RSS ranks the splits; the test uses exact fits
        rss1 = exact(start, n)
        rss2 = exact(start, j_best) + exact(j_best, n)
        s2 = max(rss2 / max(m - 2 * n_params - 1, 1), sig * sig)
        # n_params + 1 more parameters (a second curve and the split): BIC-style, with margin
        if (rss1 - rss2) / s2 < (n_params + 1) * math.log(m) + 12.0:
            break
        start = j_best
        changes += 1
    return Regime(start, changes, False)
