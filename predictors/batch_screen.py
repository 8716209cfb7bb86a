"""The batch's screens on the readings themselves: what ``cleaning.clean`` and the per-item
tests would catch, as arrays over items of one length.

The reading step is the coarsest decimal grid holding 95 % of the values; the local scatter is
each reading's residual from the line through the medians of its neighbours on either side
(a window of 2 HALF + 1), scaled by the MAD; a residual beyond HAMPEL_SIGMA of it is a spike.
The shape test fits a cubic in u = d / span to the fit's residuals and compares the RSS it
takes out with F(SHAPE_CONF; 3, n - 7): a smooth shape left means a second time constant,
a door or a drifting room, and the item goes the per-item way.
"""

from __future__ import annotations

import numpy as np
from numpy.lib.stride_tricks import sliding_window_view
from scipy.special import fdtri
from thermeta.predictors.cleaning import MAD_TO_SD

HALF = 5  # the local line's half-window (cleaning.local_line_residuals)
SHAPE_CONF = 0.99  # the residuals' cubic test (_shape_left)
QUANTA = (1.0, 0.5, 0.2, 0.1, 0.05, 0.01)  # cleaning.reading_step's grids


def _quantum(Y: np.ndarray) -> np.ndarray:
    """cleaning.reading_step per row: the coarsest decimal grid that holds 95 % of the values."""
    q = np.zeros(Y.shape[0])
    for step in reversed(QUANTA):  # finest first, so the coarsest that holds ends up set
        holds = (np.abs(Y / step - np.round(Y / step)) < 1e-6).mean(axis=1) > 0.95
        q = np.where(holds, step, q)
    return q


def _local_residuals(T: np.ndarray, Y: np.ndarray) -> np.ndarray:
    """cleaning.local_line_residuals per row (readings of one length >= 11).  The medians are
    the middle of each window by ``np.partition``; those of the times are read off directly, as
    the times of a row are in order (a row that is not is flagged before this counts)."""
    n = T.shape[1]
    w = 2 * HALF + 1
    idx = np.clip(np.arange(n) - w // 2, 0, n - w)
    tw = sliding_window_view(T, w, axis=1)[:, idx]  # (N, n, w)
    yw = sliding_window_view(Y, w, axis=1)[:, idx]
    h = w // 2
    mid = [(h - 1) // 2, h // 2]  # the middle one or two of h
    lt, rt = tw[..., mid].mean(axis=2), tw[..., [w - h + m for m in mid]].mean(axis=2)
    ly = np.partition(yw[..., :h], mid, axis=2)[..., mid].mean(axis=2)
    ry = np.partition(yw[..., -h:], mid, axis=2)[..., mid].mean(axis=2)
    dt = rt - lt
    slope = np.where(dt > 0, (ry - ly) / np.where(dt > 0, dt, 1.0), 0.0)
    level = np.partition(yw - slope[..., None] * (tw - T[..., None]), w // 2, axis=2)[..., w // 2]
    return Y - level


def _robust_sd(R: np.ndarray) -> np.ndarray:
    med = np.median(R, axis=1, keepdims=True)
    return MAD_TO_SD * np.median(np.abs(R - med), axis=1)


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
