"""Cleaning readings before any fit: order, duplicates, non-finite values, spikes.

Spikes (a probe touched, unplugged, lying on the floor) are removed in two stages, because a
robust loss alone did not hold the ETA with 2 % of readings hit by +-15 degC spikes:

1. here, a Hampel-style filter against a *local robust line* (not a plain running median, which
   lags a steep curve and would flag the newest readings of a fast chill);
2. after the model fit, :func:`residual_outliers` drops what the fitted curve says is far off, and
   the caller refits (a robust refit).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from numpy.lib.stride_tricks import sliding_window_view
from thermeta.predictors.shared import shared

MAD_TO_SD = 1.4826  # sd of a Gaussian = 1.4826 x its median absolute deviation
# a pause of more than GAP_STEPS typical sampling steps (a logger's dropout) ends a run: a line
# through readings on both sides of it bends with the curve and would flag the newest readings
GAP_STEPS = 4.0
MIN_HAMPEL = 7  # the fewest readings in a run the filter judges (a 5-reading window and more)


@dataclass
class Cleaned:
    """Readings in time order, one per timestamp, spikes removed."""

    t: np.ndarray
    y: np.ndarray
    n_in: int
    n_nonfinite: int
    n_duplicates: int
    n_out_of_order: int
    n_outliers: int
    noise_sd: float  # robust estimate of the reading noise (quantisation included)
    quantum: float  # the reading step if the values sit on a grid (0.1), else 0
    # n / n_eff of the scatter: > 1 when it is correlated from one reading to the next (a fast
    # logger, a sensor's own lag, a room's small swings), from the local residuals' lag-one
    # correlation (see scatter_inflation)
    noise_inflation: float = 1.0


def order_and_dedupe(t: np.ndarray, y: np.ndarray) -> tuple[np.ndarray, np.ndarray, int, int, int]:
    """Sort by time (stable), merge equal timestamps by their median; drop non-finite pairs.

    Returns t, y, n_nonfinite, n_duplicates, n_out_of_order.
    """
    t = np.asarray(t, dtype=float).ravel()
    y = np.asarray(y, dtype=float).ravel()
    if t.shape != y.shape:
        raise ValueError(f"t and y must have the same length ({t.size} != {y.size})")
    finite = np.isfinite(t) & np.isfinite(y)
    n_nonfinite = int(t.size - finite.sum())
    t, y = t[finite], y[finite]
    n_out_of_order = int(np.sum(np.diff(t) < 0))
    order = np.argsort(t, kind="stable")
    t, y = t[order], y[order]
    uniq, start, counts = np.unique(t, return_index=True, return_counts=True)
    n_dup = int(t.size - uniq.size)
    if n_dup:
        merged = y[start].copy()
        for i in np.flatnonzero(counts > 1):
            merged[i] = np.median(y[start[i] : start[i] + counts[i]])
        t, y = uniq, merged
    return t, y, n_nonfinite, n_dup, n_out_of_order


def reading_step(y: np.ndarray) -> float:
    """The quantisation step if most values sit on a decimal grid (0.01 .. 1), else 0."""
    if y.size < 5:
        return 0.0
    for q in (1.0, 0.5, 0.2, 0.1, 0.05, 0.01):  # coarsest grid that holds the values
        if (np.abs(y / q - np.round(y / q)) < 1e-6).mean() > 0.95:
            return q
    return 0.0


def local_line_residuals(t: np.ndarray, y: np.ndarray, half: int = 5) -> np.ndarray:
    """Residual of each reading from a robust line through its neighbours.

    For each reading, a window of 2*half+1 neighbours (shifted inward at the ends, so the newest
    reading is judged against the readings before it); slope = (median of the right half - median
    of the left half) / (their median time gap); level = median of y - slope (t - t_i).
    One spike in a window moves neither median.
    """
    n = t.size
    w = min(2 * half + 1, n)
    if w < 5:
        return np.zeros(n)
    tw = sliding_window_view(t, w)  # (n - w + 1, w)
    yw = sliding_window_view(y, w)
    # window index for each reading: centred, clamped at the ends
    idx = np.clip(np.arange(n) - w // 2, 0, n - w)
    tw, yw = tw[idx], yw[idx]
    h = w // 2
    left_t, right_t = np.median(tw[:, :h], axis=1), np.median(tw[:, -h:], axis=1)
    left_y, right_y = np.median(yw[:, :h], axis=1), np.median(yw[:, -h:], axis=1)
    dt = right_t - left_t
    slope = np.where(dt > 0, (right_y - left_y) / np.where(dt > 0, dt, 1.0), 0.0)
    level = np.median(yw - slope[:, None] * (tw - t[:, None]), axis=1)
    return y - level


def robust_sd(r: np.ndarray) -> float:
    """sd = 1.4826 median |r - median r|."""
    if r.size == 0:
        return 0.0
    return float(MAD_TO_SD * np.median(np.abs(r - np.median(r))))


def hampel_mask(
    t: np.ndarray, y: np.ndarray, n_sigma: float = 6.0, half: int = 5, floor: float = 0.0
) -> tuple[np.ndarray, float]:
    """True for readings to keep.  Also returns the robust noise sd of the local residuals."""
    r = local_line_residuals(t, y, half)
    # measured on pure Gaussian noise: these residuals carry 0.99 of the noise sd
    sd = robust_sd(r) / 0.99
    scale = max(sd, floor)
    if scale <= 0:
        return np.ones(t.size, bool), sd
    return np.abs(r) <= n_sigma * scale, sd


def runs(t: np.ndarray, gap_steps: float = GAP_STEPS, half: int = 5) -> list[slice]:
    """Stretches of time-ordered readings without a pause longer than ``gap_steps`` times the
    sampling step around it (the median of the ``half`` steps on either side), so a logger that
    changes its rate (every 5 min, then every minute in an alarm) is not cut at each step."""
    if t.size < 2:
        return [slice(0, t.size)]
    d = np.diff(t)
    w = min(2 * half + 1, d.size)
    idx = np.clip(np.arange(d.size) - w // 2, 0, d.size - w)
    local = np.median(sliding_window_view(d, w)[idx], axis=1)
    cuts = np.flatnonzero(d > gap_steps * local) + 1
    edges = [0, *cuts.tolist(), t.size]
    return [slice(a, b) for a, b in zip(edges[:-1], edges[1:])]


def gap_hampel_mask(
    t: np.ndarray, y: np.ndarray, n_sigma: float, floor: float
) -> tuple[np.ndarray, float]:
    """:func:`hampel_mask` within each run between dropouts (:func:`runs`); a run too short to
    judge keeps its readings, for the fitted curve to judge (:func:`residual_outliers`).  The
    noise sd is the one of the longest run judged."""
    keep, sd, longest = np.ones(t.size, bool), 0.0, 0
    for run in runs(t):
        n = run.stop - run.start
        if n < MIN_HAMPEL:
            continue
        keep[run], run_sd = hampel_mask(t[run], y[run], n_sigma=n_sigma, floor=floor)
        if n > longest:
            sd, longest = run_sd, n
    return keep, sd


@shared
def clean(t: np.ndarray, y: np.ndarray, *, n_sigma: float = 6.0) -> Cleaned:
    """Order, dedupe and de-spike readings.  Never raises on bad values (only on bad shapes)."""
    t0 = np.asarray(t, dtype=float).ravel()
    t2, y2, n_nf, n_dup, n_ooo = order_and_dedupe(t0, y)
    q = reading_step(y2)
    # quantisation alone is uniform noise of sd q / sqrt(12); never call a one-step wobble a spike
    # and never call the curvature of a noise-free curve a spike: 0.1 % of the range at least
    floor = max(q, 1e-3 * (float(np.ptp(y2)) if y2.size else 0.0), 1e-9)
    keep, sd = gap_hampel_mask(t2, y2, n_sigma, floor)
    sd = max(sd, q / np.sqrt(12.0))
    return Cleaned(
        t=t2[keep],
        y=y2[keep],
        n_in=int(t0.size),
        n_nonfinite=n_nf,
        n_duplicates=n_dup,
        n_out_of_order=n_ooo,
        n_outliers=int((~keep).sum()),
        noise_sd=float(sd),
        quantum=q,
        noise_inflation=scatter_inflation(t2[keep], y2[keep]),
    )


# the lag-one correlation of local_line_residuals of white scatter (measured on 2,000 seeded
# Gaussian readings: -0.10; a moving line through 11 readings makes its residuals so)
WHITE_LAG_ONE = -0.10


def scatter_inflation(t: np.ndarray, y: np.ndarray) -> float:
    """n / n_eff = (1 + r) / (1 - r) of the readings' scatter, r the lag-one correlation of the
    residuals from a local robust line, rescaled so that white scatter gives 1 (its local
    residuals' own correlation, WHITE_LAG_ONE, is taken off).  The local line follows any
    smooth curve, so this is a property of the scatter, not of the shape."""
    if t.size < 16:
        return 1.0
    r = local_line_residuals(t, y)
    r = r - np.median(r)
    den = float(r @ r)
    if den <= 0:
        return 1.0
    lag = float(r[1:] @ r[:-1]) / den
    rho = min(max((lag - WHITE_LAG_ONE) / (1.0 - WHITE_LAG_ONE), 0.0), 0.95)
    if rho <= 2.0 / math.sqrt(t.size):
        return 1.0
    return (1.0 + rho) / (1.0 - rho)


def residual_outliers(
    residuals: np.ndarray, n_sigma: float = 4.0, floor: float = 0.0
) -> np.ndarray:
    """True where a residual from the fitted curve is an outlier (robust scale, n_sigma)."""
    r = np.asarray(residuals, float)
    scale = max(robust_sd(r), floor)
    if scale <= 0:
        return np.zeros(r.size, bool)
    return np.abs(r - np.median(r)) > n_sigma * scale
