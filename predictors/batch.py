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
   e^(-k d) = e^(-kD u) with u = d / D_i), the sums ``Sye`` as one matrix product,
   ``fit_lumped``'s bounded Brent search in ln k from the grid's best point, every row at once;
   k's and the ambient's 90 % profile intervals on each item's own fine grid, widened by
   n / n_eff where the residuals are correlated from one reading to the next (as ``forecast()``
   widens them, with its note).  Then the screens,
   each a reason to go the per-item way: too few readings, readings not strictly in time,
   a spike (the Hampel filter's or the robust refit's test), a possible change of surroundings
   (the newest readings off the curve, beyond its noise band), a poor fit (scatter about the
   curve well above the readings' own local scatter, a smooth shape left in the residuals, or
   their lag-one correlation beyond LAG_CAP: a second time constant, a door, a drifting room, a
   sawtooth), a given ambient the readings contradict, the first half's fit that did not
   foresee the newest level (the self-check), a fit at the grid's edge, readings that do not
   move.
2. :meth:`Prepared.forecast` (per threshold and side, scalar): the crossing, the bend kept ahead
   (``fit_lumped``'s rule), the crossing's interval (``lumped_profile.eta_sets`` on the item's
   grid), then the same ``fill_lumped`` and notes as the per-item path.

Not here (the caller sends them the per-item way): a measured ambient, the core-probe shapes and
``auto``, a learned prior, ``detect_regimes=False``.  The per-item path is the reference:
``tests/test_batch.py`` holds the two to the same ETA within 1 % and the same outcome.

This module owns the items (:class:`Series`, :class:`Prepared`, :class:`Flag`), the flags that
send them the per-item way; the shared-grid estimator and its intervals are in ``batch_fit``,
the screens on the readings alone (step, local scatter, residual shape) in ``batch_screen``,
the self-check and the crossings' intervals for many rows at once in ``batch_check``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from enum import StrEnum
from typing import Any

import numpy as np
from thermeta.predictors.batch_check import all_ends, self_check
from thermeta.predictors.batch_fit import FINE, KD_GRID, _Ambient, _analyse
from thermeta.predictors.batch_screen import (
    HALF,
    _local_residuals,
    _quantum,
    _robust_sd,
    _shape_left,
)
from thermeta.predictors.combined_forecast import (
    RICH_MIN,
    note_ambient_agreement,
)
from thermeta.predictors.context import AmbientMode, Context
from thermeta.predictors.forecast import MIN_POINTS, MIN_POINTS_KNOWN
from thermeta.predictors.lumped import (
    TREND_REACH,
    LumpedFit,
    crossing_eta,
    shrunk_eta,
)
from thermeta.predictors.lumped_forecast import fill_lumped
from thermeta.predictors.lumped_profile import Sums, eta_sets
from thermeta.predictors.outcome import NoteCode
from thermeta.predictors.result import Forecast
from thermeta.predictors.wording import DisplayUnit, showing

CHUNK_CELLS = 12_000_000  # items x grid x readings per product (96 MB of doubles; 4M: 18 % slower)
HAMPEL_SIGMA = 6.0  # cleaning.clean's spike test
OUTLIER_SIGMA = 4.0  # lumped_forecast's robust-refit test
GAP_STEPS = 4.0  # cleaning.GAP_STEPS
POOR_FIT = 1.5  # scatter about the curve / the readings' local scatter beyond which: per item
BAND_SIGMA = 3.0  # the newest readings' mean residual, in its standard errors
NEWEST = 5  # readings that make "the newest"
LAG_CAP = 0.5  # residuals' lag-one correlation beyond which: per item (a door, a sawtooth)


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
    ERROR = "error"  # the batch raised on the item (prepare_safely): counted, the per-item way


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
    inflate: float = 1.0  # n / n_eff of correlated residuals: the intervals widened by it
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
        if self.inflate > 1.0:  # lumped_forecast's note, before fill_lumped's own
            fc.note(
                NoteCode.CORRELATED_SCATTER,
                f"the readings' scatter is correlated from one reading to the next: they count "
                f"as about {t.size / self.inflate:.0f} independent ones, and the interval is "
                "that wide",
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


def prepare_safely(series: list[Series]) -> list[Prepared | Flag]:
    """:func:`prepare`, where an exception on some items costs only them: the chunk is halved
    until the items that raise stand alone, and they come back as ``Flag.ERROR`` (what the
    refit's worker processes run, daemon/refit/workers.py)."""
    try:
        return prepare(series)
    except Exception:  # noqa: BLE001 - one item's bad data never costs the others their fit
        if len(series) <= 1:
            return [Flag.ERROR] * len(series)
        h = len(series) // 2
        return prepare_safely(series[:h]) + prepare_safely(series[h:])


# -- the vectorised steps (the estimator: batch_fit; the readings' screens: batch_screen) -------


def _rows(
    A: dict, series: list[Series], T: np.ndarray, amb: _Ambient, q, still, at: np.ndarray
) -> dict[int, Prepared]:
    """The Prepared of each row in ``at`` from _analyse's arrays."""
    f, s = A["fits"], A["s"]
    last = np.maximum(A["n"].astype(int) - 1, 0)
    out = {}
    for i in at.tolist():
        sr = series[i]
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
        out[i] = Prepared(
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
            float(A["infl"][i]),
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
    A = _analyse(T, Y, np.ones_like(T), amb, inflate=True)
    f, res, sigma = A["fits"], A["res"], A["sigma"]
    flag(f.edge, Flag.EDGE)
    # the robust refit's test (lumped_forecast): a reading far off the fitted curve
    med = np.median(res, axis=1, keepdims=True)
    scale = np.maximum(_robust_sd(res), np.maximum(np.maximum(q, noise_sd), 1e-3 * ptp))
    flag((np.abs(res - med) > OUTLIER_SIGMA * scale[:, None]).any(1), Flag.SPIKE)
    # a poor fit: scatter about the curve well above the readings' own, residuals correlated
    # beyond what scatter alone makes them (correlation below that widens the intervals, as in
    # forecast()), or a smooth shape left in them
    flag(A["lag"] > LAG_CAP, Flag.POOR_FIT)
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
    flag(self_check(T, Y, amb, np.array([fl is None for fl in flags])), Flag.DOUBT)
    rows = _rows(A, series, T, amb, q, still, np.flatnonzero([fl is None for fl in flags]))
    pairs = [(i, th) for i, sr in enumerate(series) if flags[i] is None for th in sr.thresholds]
    if pairs:
        at = np.array([i for i, _ in pairs])
        ths = np.array([th for _, th in pairs], float)
        lo, hi = all_ends(A, at, ths - A["ybar"][at])
        for (i, th), a, b in zip(pairs, lo, hi):
            rows[i].bounds[float(th)] = (float(a), float(b))
    return [fl if fl is not None else rows[i] for i, fl in enumerate(flags)]
