"""Regime changes: find when the surroundings last changed, so the fit uses only the data since.

A change of ambient (a door opened then closed, a compressor restarting, chiller water switched)
bends the curve: dT/dt = -k (T - Ta) jumps with Ta.  One lumped curve then fits badly.  The search:

1. gate: if one lumped fit already explains the readings to their own noise level, there is no
   change (cheap, and it keeps the search off healthy noise);
2. a thermostat's sawtooth (a healthy fridge cycling) is recognised by repeated reversals of
   the local slope; the window is then kept whole, unless the newest monotone run is much longer
   than the usual runs (the unit stopped cycling);
3. otherwise binary segmentation on the tail: the split that lowers the RSS of two lumped fits the
   most, kept when the gain beats a BIC-style penalty in units of the residual variance times the
   scatter's n / n_eff (read from the side one curve explains; a side that holds a change of its
   own is read from its halves); repeated on the part after the split.

A door opened and closed again is a change that leaves the load's k and the ambient as they were:
find_door sees one too short for step 3 (a few minutes of readings), split_disturbance places its
start and end with the older curve's k, and the forecast (predictors.forecast._carry_before)
carries k from the readings before into the newest regime's fit when the two agree.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np
from thermeta.predictors.lumped import LumpedFit, fit_lumped, quick_rss
from thermeta.predictors.shared import shared

MIN_REGIME_POINTS = 12
RssFn = Callable[[int, int], float]


@dataclass
class Regime:
    start_index: int
    n_changes: int
    cycling: bool
    note: str | None = None
    changes: list[int] = field(default_factory=list)  # indices of the cuts found, oldest first


def _rss(t: np.ndarray, y: np.ndarray) -> float:
    return quick_rss(t, y)


def smooth_rss(t: np.ndarray, y: np.ndarray) -> float:
    """RSS of two time constants toward one ambient on the readings, when that curve is
    monotone over them (inf otherwise, or when it cannot be fitted): the smooth shape of a
    two-node body, which a change of the surroundings that reverses the curve is not."""
    from thermeta.predictors.combine import binned
    from thermeta.predictors.two_exp import fit_two_exp

    tb, yb = binned(t, y)
    f = fit_two_exp(tb, yb)
    if not f.ok:
        return math.inf
    x = np.linspace(t[0], t[-1], 64)
    d = x - f.t_first
    slope = -f.k1 * f.b1 * np.exp(-f.k1 * d) - f.k2 * f.b2 * np.exp(-f.k2 * d)
    if np.any(slope > 0) and np.any(slope < 0):
        return math.inf
    if tb.size == t.size:
        return f.rss
    r = y - f.curve(t)
    return float(r @ r)


def slope_runs(
    t: np.ndarray, y: np.ndarray, noise_sd: float, half: int = 8
) -> list[tuple[int, int, int]]:
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


SWING_RANGE = 0.25  # ... and at least this share of the readings' whole range
SWING_NOISE = 4.0  # a thermostat's swing spans at least this many sd of the readings' scatter


def swings_clear(y: np.ndarray, runs: list[tuple[int, int, int]], noise_sd: float) -> bool:
    """Whether the rises and falls of the slope runs are a thermostat's swings: their median
    height at least SWING_NOISE sd of the scatter (a cold room swings by a degree or more
    against a tenth of a degree of scatter; correlated scatter wanders by a few sd) and
    SWING_RANGE of the readings' range."""
    heights = [abs(float(y[b]) - float(y[a])) for a, b, _ in runs]
    swing = float(np.median(heights))
    # and the readings stay near their band: a load warming by several swings with wobbles on
    # the way is not cycling (a room losing ground drifts by a swing or so over the window)
    return swing >= SWING_NOISE * max(noise_sd, 1e-9) and swing >= SWING_RANGE * float(np.ptp(y))


@shared
def find_regime(
    t: np.ndarray,
    y: np.ndarray,
    noise_sd: float,
    *,
    min_points: int = MIN_REGIME_POINTS,
    max_changes: int = 4,
    rss: RssFn | None = None,
    exact: RssFn | None = None,
    fit_sigma: float | None = None,
    n_params: int = 3,
    smooth: RssFn | None = None,
    inflation: float = 1.0,
) -> Regime:
    """Index where the current regime starts (0 = the whole window).

    rss / exact: RSS of the model on a slice (i0, i1) of the readings, a quick one to rank the
    splits and an exact one to test the best (default: the fitted-ambient lumped curve);
    fit_sigma: the residual sd of the model on the whole window (default: computed here).
    smooth: RSS of the richer single model on a slice, (default for the lumped curve: two time
    constants toward one ambient, monotone over the slice): a change is declared only when no
    single smooth curve of the family explains both sides (a second time constant is not a
    change of the surroundings).  inflation: n / n_eff of the readings' scatter (correlated
    scatter, see cleaning.Cleaned), for doors and cycles; each split's gain is judged against
    the residual variance times the split's own n / n_eff (_split_inflation).
    """
    n = t.size
    if n < 2 * min_points:
        return Regime(0, 0, False)
    if smooth is None and rss is None:
        smooth = lambda i0, i1: smooth_rss(t[i0:i1], y[i0:i1])
    rss = rss or (lambda i0, i1: _rss(t[i0:i1], y[i0:i1]))
    kept: dict[tuple[int, int], LumpedFit] = {}
    if exact is None:

        def exact(i0: int, i1: int) -> float:
            f = fit_lumped(t[i0:i1], y[i0:i1], float(y[i1 - 1]), intervals=False)
            if f.ok:
                kept[(i0, i1)] = f
            return f.rss if f.ok else math.inf

    if fit_sigma is None:
        full = fit_lumped(t, y, float(y[-1]), intervals=False)
        if not full.ok:
            return Regime(0, 0, False)
        fit_sigma = full.sigma
    sig = max(noise_sd, 1e-6)
    if fit_sigma <= 1.5 * sig:
        return Regime(0, 0, False)
    runs = slope_runs(t, y, sig)
    if len(runs) >= 4 and not swings_clear(y, runs, sig):
        runs = []  # wanderings of correlated scatter, not a thermostat's swings
    if len(runs) >= 4:
        # cycling: keep the window whole unless the newest run outlasts the usual ones
        last = runs[-1]
        same = [r for r in runs[:-1] if r[2] == last[2]]
        dur = lambda r: t[r[1]] - t[r[0]]
        if not same or dur(last) <= 2.0 * max(dur(r) for r in same) or last[1] < n - 3:
            return Regime(
                0,
                len(runs) - 1,
                True,
                "the readings cycle (a thermostat?); fitted the whole window",
            )
        return Regime(
            max(runs[-2][1], 0),
            len(runs) - 1,
            True,
            "the readings stopped cycling; fitted the newest run only",
        )

    def best_split(lo: int, hi: int) -> int:
        """The split of [lo, hi) that the quick RSS ranks best."""
        cands = lo + np.unique(np.linspace(min_points, hi - lo - min_points, 14).astype(int))
        scores = np.array([rss(lo, j) + rss(j, hi) for j in cands])
        i = int(np.argmin(scores))
        # refine between the neighbouring candidates
        fine = np.unique(
            np.linspace(cands[max(i - 1, 0)], cands[min(i + 1, cands.size - 1)], 9).astype(int)
        )
        fine = fine[(fine >= lo + min_points) & (fine <= hi - min_points)]
        j_best, best = int(cands[i]), float(scores[i])
        if fine.size:
            fs = np.array([rss(lo, j) + rss(j, hi) for j in fine])
            if fs.min() < best:
                j_best = int(fine[np.argmin(fs)])
        return j_best

    def side_inflation(i0: int, i1: int) -> float | None:
        """n / n_eff of the scatter about one side's curve: its residuals' lag-one inflation,
        or, when the side holds a change of its own (a door opened, then closed: a misfit on
        both sides of the split between them), the larger of its two halves' at its own best
        split, if that is smaller (both halves must look white for the side to count as white:
        correlated scatter stays correlated on either half).  None without the side's fit."""
        res = _res(kept, i0, i1)
        if res is None:
            return None
        infl = lag_inflation(res)
        if infl > 1.0 and i1 - i0 >= 2 * min_points:
            j = best_split(i0, i1)
            exact(i0, j)
            exact(j, i1)
            left, right = _res(kept, i0, j), _res(kept, j, i1)
            if left is not None and right is not None:
                halves = max(short_inflation(left, n_params), short_inflation(right, n_params))
                infl = min(infl, halves)
        return infl

    start, changes, cuts = 0, 0, []
    while changes < max_changes and n - start >= 2 * min_points:
        m = n - start
        j_best = best_split(start, n)
        # the quick RSS ranks the splits; the test uses exact fits
        rss1 = exact(start, n)
        rss2 = exact(start, j_best) + exact(j_best, n)
        s2 = max(rss2 / max(m - 2 * n_params - 1, 1), sig * sig)
        s2 *= _split_inflation(side_inflation(start, j_best), side_inflation(j_best, n), inflation)
        # n_params + 1 more parameters (a second curve and the split): BIC-style, with margin
        if (rss1 - rss2) / s2 < (n_params + 1) * math.log(m) + 12.0:
            break
        # the split has two parameters more than one smooth two-time-constant curve
        if smooth is not None and (smooth(start, n) - rss2) / s2 < 2 * math.log(m) + 12.0:
            break
        start = j_best
        changes += 1
        cuts.append(j_best)
    return Regime(start, changes, False, changes=cuts)


def _res(kept: dict[tuple[int, int], LumpedFit], i0: int, i1: int) -> np.ndarray | None:
    f = kept.get((i0, i1))
    return None if f is None else np.asarray(f.residuals)


def _split_inflation(left: float | None, right: float | None, scatter: float) -> float:
    """n / n_eff of the scatter around the two curves of a split: the smaller of the two sides'
    lag-one inflations (find_regime's side_inflation).  Correlated scatter (a fast logger's AR(1)
    wander) is a property of the sensor and shows on both sides; the misfit of a side that still
    holds a change (a door opened, then closed minutes ago) shows on that side only, so the side
    one curve explains best speaks for the scatter.  The split test counts readings as
    independent; without this it takes the wander of correlated scatter for changes of the
    surroundings (the gain of a free split grows with n / n_eff; the variance of a mean of an
    AR(1) series, Box, Jenkins & Reinsel, Time Series Analysis, from memory).  Without the sides'
    residuals (a caller's own fits): ``scatter``, the readings' inflation from local lines, which
    a sharp change among few readings inflates too (a door in 53 readings of white scatter: 3.6),
    so it is not used where the sides are known."""
    if left is None or right is None:
        return scatter
    return min(left, right)


def oldest_regime_end(
    t: np.ndarray,
    y: np.ndarray,
    noise_sd: float,
    reg: Regime,
    *,
    min_points: int = MIN_REGIME_POINTS,
    margin: int = 2,
    inflation: float = 1.0,
) -> int:
    """End index (exclusive) of the readings before the first change, or 0 if too few.

    The first cut may fall anywhere inside a short disturbance (a door open a few minutes holds
    fewer readings than a regime needs), so the part before it is searched again until one curve
    explains it; ``margin`` readings are dropped before the cut, which is only located to within
    a reading or two.
    """
    if not reg.changes:
        return 0
    end = reg.changes[0]
    for _ in range(4):
        inner = find_regime(t[:end], y[:end], noise_sd, min_points=min_points, inflation=inflation)
        if inner.cycling:
            return 0
        if not inner.changes:
            break
        end = inner.changes[0]
    end -= margin
    return end if end >= min_points else 0


def split_disturbance(
    t: np.ndarray,
    y: np.ndarray,
    before: Callable[[np.ndarray], np.ndarray],
    k: float,
    ambient: float,
    i0: int,
    min_tail: int = 4,
) -> tuple[int, int]:
    """Where a disturbance that began after reading i0 starts (c1) and where the newest regime
    starts (j), when the load keeps its k and ambient across it (a door opened, closed again).

    Three pieces from i0 on, each a lumped curve with the same k: the older curve ``before`` (the
    fit of the readings before i0, no parameter free) up to c1; the disturbance from c1 to j,
    toward its own ambient (both levels free); the newest regime from j, toward ``ambient`` (its
    start free).  (c1, j) minimise the sum of the three RSS (prefix sums, see _best_pair).  A
    reading too many given to the disturbance costs little, so the splits err toward a longer
    disturbance, which only drops a reading or two from the fits on either side.
    """
    n = t.size
    tt, yy = t[i0:], y[i0:]
    m = tt.size
    if m < min_tail:
        return i0, i0
    e = np.exp(-k * (tt - tt[0]))
    old_r = yy - before(tt)
    r_old = _cum(old_r * old_r)  # r_old[c] = RSS of the older curve on [0, c)
    r_tail = _one_level_suffix(yy - ambient, e)
    door = _two_level_rss(yy, e)
    cb, jb, _ = _best_pair(
        lambda c, j: r_old[c] + door(c, j) + r_tail[j], 0, m - min_tail, m - min_tail
    )
    if n - (i0 + jb) < min_tail:
        return i0, i0
    return i0 + cb, i0 + jb


def _cum(v: np.ndarray) -> np.ndarray:
    return np.concatenate([[0.0], np.cumsum(v)])


def _one_level_suffix(r: np.ndarray, e: np.ndarray) -> np.ndarray:
    """RSS of r = b e (b free) on every suffix [j, m), for j = 0..m."""
    srr, sre, see = (_cum(v[::-1])[::-1] for v in (r * r, r * e, e * e))
    return srr - np.divide(sre**2, see, out=np.zeros_like(see), where=see > 0)


def _one_level_prefix(r: np.ndarray, e: np.ndarray) -> np.ndarray:
    """RSS of r = b e (b free) on every prefix [0, c), for c = 0..m."""
    prr, pre, pee = _cum(r * r), _cum(r * e), _cum(e * e)
    return prr - np.divide(pre**2, pee, out=np.zeros_like(pee), where=pee > 0)


def _two_level_rss(yy: np.ndarray, e: np.ndarray) -> Callable[[np.ndarray, np.ndarray], np.ndarray]:
    """RSS of y = p + q e (both free) on slices [c, j), by prefix sums: a function of index
    arrays c (column) and j (row) giving the matrix; zero where two readings or fewer (an exact
    fit)."""
    S1, Se, Se2, Sy, Sye, Syy = (_cum(v) for v in (np.ones(yy.size), e, e * e, yy, yy * e, yy * yy))

    def rss(c: np.ndarray, j: np.ndarray) -> np.ndarray:
        n_ = S1[j] - S1[c]
        se, se2 = Se[j] - Se[c], Se2[j] - Se2[c]
        sy, sye, syy = Sy[j] - Sy[c], Sye[j] - Sye[c], Syy[j] - Syy[c]
        det = n_ * se2 - se * se
        with np.errstate(divide="ignore", invalid="ignore"):
            p = (se2 * sy - se * sye) / det
            q = (n_ * sye - se * sy) / det
            r = syy - p * sy - q * sye
        return np.where(
            (n_ >= 3) & (det > 1e-12 * np.maximum(n_ * se2, 1e-300)), np.maximum(r, 0.0), 0.0
        )

    return rss


PAIR_GRID = 120  # candidates per side in the coarse pass: memory and time stay O(PAIR_GRID^2)


def _best_pair(
    total: Callable[[np.ndarray, np.ndarray], np.ndarray], c_lo: int, c_hi: int, j_hi: int
) -> tuple[int, int, float]:
    """(c, j) with c_lo <= c <= j <= j_hi, c <= c_hi, minimising total(c, j) (vectorised over
    index arrays).  Long windows: a coarse grid of PAIR_GRID candidates a side, then every index
    within one grid step of the coarse best, so cost stays bounded where a full matrix would
    not (3,000 readings: 9 million pairs)."""
    if c_hi < c_lo or j_hi < c_lo:
        return c_lo, c_lo, math.inf

    def search(cs: np.ndarray, js: np.ndarray) -> tuple[int, int, float]:
        c, j = cs[:, None], js[None, :]
        tot = np.where(j >= c, total(c, j), np.inf)
        a, b = np.unravel_index(int(np.argmin(tot)), tot.shape)
        return int(cs[a]), int(js[b]), float(tot[a, b])

    step = max(1, math.ceil((j_hi - c_lo + 1) / PAIR_GRID))
    cs = np.unique(np.append(np.arange(c_lo, c_hi + 1, step), c_hi))
    js = np.unique(np.append(np.arange(c_lo, j_hi + 1, step), j_hi))
    c0, j0, best = search(cs, js)
    if step == 1:
        return c0, j0, best
    cs = np.arange(max(c_lo, c0 - step), min(c_hi, c0 + step) + 1)
    js = np.arange(max(c_lo, j0 - step), min(j_hi, j0 + step) + 1)
    return search(cs, js)


@dataclass
class Door:
    """A disturbance between readings c1 and j that left k and the ambient as they were."""

    found: bool
    c1: int
    j: int
    stat: float
    rss: float = math.inf  # of the door model
    scale: float = 1.0  # the residual variance (times the inflation) the gain was judged by


def find_door(
    t: np.ndarray,
    y: np.ndarray,
    k: float,
    ambient: float,
    rss_single: float,
    *,
    min_side: int = 8,
    min_tail: int = 4,
    inflation: float = 1.0,
) -> Door:
    """A short disturbance (a door opened, then closed) inside the window, too short for the
    regime search (whose pieces need a dozen readings each).

    Model: before c1 and from j on, curves with the given k toward the given ambient (each its
    own start); between, a curve with the same k toward its own ambient.  Kept when the RSS gain
    over one curve (rss_single), in units of the model's residual variance, beats a BIC-style
    penalty for its five more parameters (two levels, two instants, one start) with the regime
    search's margin of 12.
    """
    m = t.size
    if m < min_side + min_tail + 3:
        return Door(False, 0, 0, 0.0)
    e = np.exp(-k * (t - t[0]))
    r = y - ambient
    r_pre, r_suf = _one_level_prefix(r, e), _one_level_suffix(r, e)
    door = _two_level_rss(y, e)
    ci, ji, best = _best_pair(
        lambda c, j: r_pre[c] + door(c, j) + r_suf[j], min_side, m - min_tail, m - min_tail
    )
    s2 = max(best / max(m - 7, 1), 1e-18)
    # correlated scatter inflates the gain: judged against the door model's own residuals
    infl = max(inflation, lag_inflation(_door_residuals(y, r, e, ci, ji)))
    stat = (rss_single - best) / s2 / infl
    return Door(bool(stat >= 5 * math.log(m) + 12.0), ci, ji, float(stat), best, s2 * infl)


def _door_residuals(y: np.ndarray, r: np.ndarray, e: np.ndarray, c: int, j: int) -> np.ndarray:
    """Residuals of find_door's three pieces: b e before c, p + q e from c to j, b' e after."""
    out = []
    for a, b in ((0, c), (j, r.size)):
        rr, ee = r[a:b], e[a:b]
        den = float(ee @ ee)
        out.append(rr - (float(rr @ ee) / den if den > 0 else 0.0) * ee)
    yy, ee = y[c:j], e[c:j]
    if yy.size >= 3:
        X = np.column_stack([np.ones_like(ee), ee])
        coef, *_ = np.linalg.lstsq(X, yy, rcond=None)
        out.insert(1, yy - X @ coef)
    return np.concatenate(out)


def short_inflation(res: np.ndarray, n_params: int = 3) -> float:
    """(1 + rho) / (1 - rho) of a short stretch's residuals, without lag_inflation's
    white-noise band (which lets a dozen correlated readings pass for white) and with the
    lag-one estimate's downward bias on residuals of a fitted curve taken off (about
    (n_params + 1) / n, from memory; a fitted curve takes up part of the wander)."""
    if res.size < 4:
        return math.inf
    res = res - res.mean()
    den = float(res @ res)
    if den <= 0:
        return 1.0
    rho = float(res[1:] @ res[:-1]) / den + (n_params + 1) / res.size
    rho = min(max(rho, 0.0), 0.98)
    return (1.0 + rho) / (1.0 - rho)


def lag_inflation(res: np.ndarray) -> float:
    """(1 + rho) / (1 - rho) of residuals with lag-one correlation rho beyond the white-noise
    band (2 / sqrt(n)); 1 otherwise."""
    if res.size < 8:
        return 1.0
    res = res - res.mean()
    den = float(res @ res)
    if den <= 0:
        return 1.0
    rho = float(res[1:] @ res[:-1]) / den
    if rho <= 2.0 / math.sqrt(res.size):
        return 1.0
    rho = min(rho, 0.98)
    return (1.0 + rho) / (1.0 - rho)
