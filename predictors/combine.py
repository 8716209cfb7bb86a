"""Choosing and combining forecasts by how well they forecast the item's own readings.

When one exponential does not explain an item's readings (two time constants, early cooling
sped up by evaporation, a sensor's own lag, a drifting room), the curves of
predictors.candidates are scored by a rolling-origin backtest: each is fitted to the readings up
to an earlier origin (a quarter to four fifths of the way through them) and asked when the item
would reach the levels it then reached (halfway to the newest reading, and the newest level);
the error is |ln(forecast time / actual time)|, a forecast that never gets there counting as
ln 10.  A candidate's score is the mean of its squared errors; its weight 1 / (score + 0.01).

    point forecast   the weighted median of the candidates' ln ETA (a "never" counts as +inf);
                     "never" only when most of the weight says so, the curves that say it
                     level off clearly short of the threshold (by NEVER_MARGIN of the way left)
                     and, with a given ambient beyond the threshold, the readings contradict it
    interval         conformal from the same backtest: the combined forecast's own errors at
                     the origins, their root mean square (with a floor) scaled up with how much
                     further ahead the forecast reaches than the backtest did, as a band in ln
                     ETA at Student's 90 % point for that many errors; it spans the credible
                     candidates too, and its late end is open when OPEN_SHARE of the weight
                     says "never"

The local curve's share of bend kept ahead is chosen by the same backtest (the lowest score).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from scipy.special import ndtri
from thermeta.predictors import baselines
from thermeta.predictors.candidates import BENDS, Candidate, Local, Lumped, Spec, fit_all
from thermeta.predictors.lumped import fit_lumped
from thermeta.predictors.quantiles import t_ppf
from thermeta.predictors.shared import shared
from thermeta.predictors.two_exp import effective_share

ORIGINS = (0.25, 0.35, 0.5, 0.65, 0.8)  # backtest origins, as shares of the readings' span
ENDS = (0.5, 1.0)  # levels reached halfway from the origin to the newest reading, and at it
MIN_ORIGIN = 6  # readings before an origin
LEVEL_SHARE = 0.04  # a level: the mean of the readings within 4 % of the span around it
MISS = math.log(10.0)  # the error of a forecast that never gets there (and the cap)
EPS = 0.01  # weights 1 / (score + EPS)
NEVER_MARGIN = 0.2  # a level-off counts as clear when short of the threshold by this share
CREDIBLE = 0.1  # a candidate with this share of the weight is credible
OPEN_SHARE = 0.3  # the late end is open when candidates with this share of the weight say "never"
Z90 = 1.6448536269514722
SLOWING_Z = float(ndtri(0.99))  # one-sided 99 % normal point (scipy.special)
FLOOR = 0.05  # the least rms of ln ETA errors the interval assumes (the backtest is short)
MAX_BINS = 240  # longer regimes are averaged into this many bins for the fits


@dataclass
class Point:
    """One backtest question: from the first ``n`` readings, when is ``level`` reached
    (``actual`` seconds after the origin's newest reading)?"""

    n: int
    level: float
    actual: float


@dataclass
class Combined:
    """The combined forecast: ETA from the newest reading (None: never), its 90 % interval
    (None ends open), the weights and scores of the candidates, the backtest's size."""

    eta_s: float | None
    eta_lo_s: float | None
    eta_hi_s: float | None
    weights: dict[str, float]
    scores: dict[str, float]
    best: str
    n_points: int
    candidates: dict[str, Candidate] = field(default_factory=dict)
    never_clear: bool = False
    # curves that level off short were overruled: the readings' rate falls beyond one
    # exponential, so a level-off is only a lower bound on the change to come (slowing())
    overruled: bool = False


def binned(t: np.ndarray, y: np.ndarray, max_bins: int = MAX_BINS):
    """Readings averaged in groups of consecutive readings so that at most ``max_bins`` remain
    (the newest reading keeps a group of its own size)."""
    n = t.size
    if n <= max_bins:
        return t, y
    m = math.ceil(n / max_bins)
    cut = n - (n // m) * m
    tt, yy = t[cut:].reshape(-1, m).mean(1), y[cut:].reshape(-1, m).mean(1)
    return tt, yy


def backtest_points(t: np.ndarray, y: np.ndarray) -> list[Point]:
    """The backtest's questions (see the module docstring)."""
    span = float(t[-1] - t[0])
    half = 0.5 * LEVEL_SHARE * span
    out = []
    for share in ORIGINS:
        n = int(np.searchsorted(t, t[0] + share * span, side="right"))
        if n < MIN_ORIGIN or t.size - n < 3:
            continue
        t_o, y_o = float(t[n - 1]), float(np.mean(y[max(0, n - 3) : n]))
        for end in ENDS:
            if end >= 1.0:
                sel = t >= t[-1] - 2 * half
                at = float(t[-1]) - half
            else:
                at = t_o + end * (float(t[-1]) - t_o)
                sel = np.abs(t - at) <= half
            if sel.sum() == 0 or at <= t_o:
                continue
            level = float(np.mean(y[sel]))
            if abs(level - y_o) < 1e-12:
                continue
            out.append(Point(n, level, at - t_o))
    return out


def log_error(est: float | None, actual: float) -> float:
    if est is None or not est > 0:
        return MISS
    return min(abs(math.log(est / actual)), MISS)


@dataclass
class Scored:
    """The candidates fitted to the (binned) readings and scored by their backtest: everything of
    the combination that does not depend on the threshold."""

    t: np.ndarray
    y: np.ndarray
    points: list[Point]
    final: dict[str, Candidate]
    ests: dict[str, list[float | None]]
    scores: dict[str, float]
    weights: dict[str, float]
    slowing: bool = False  # the rate falls beyond one exponential (see slowing())


@shared
def score(t: np.ndarray, y: np.ndarray, spec: Spec) -> Scored:
    """Fit the candidates to (t, y) and score them by backtest (module docstring); the local
    curve's share of bend is set here."""
    t, y = binned(t, y)
    points = backtest_points(t, y)
    final = fit_all(t, y, spec)
    names = [m for m, c in final.items() if c.ok]
    # each origin's candidates: the fits a forecaster at that time would have made
    ests: dict[str, list[float | None]] = {m: [] for m in names}
    local_ests: dict[float, list[float | None]] = {c: [] for c in BENDS}
    fitted: dict[int, dict[str, Candidate]] = {}
    for p in points:
        if p.n not in fitted:
            fitted[p.n] = fit_all(t[: p.n], y[: p.n], spec, names)
        for m in names:
            cand = fitted[p.n][m]
            if m == "local":
                for c in BENDS:
                    local_ests[c].append(cand.eta(p.level, None, bend=c) if cand.ok else None)
            ests[m].append(cand.eta(p.level) if cand.ok else None)
    scores: dict[str, float] = {}
    for m in names:
        if m == "local" and points:
            by_bend = {c: _score(local_ests[c], points) for c in BENDS}
            best_c = min(by_bend, key=lambda c: by_bend[c])
            final[m].bend = best_c
            ests[m] = local_ests[best_c]
            scores[m] = by_bend[best_c]
        else:
            scores[m] = _score(ests[m], points) if points else math.nan
    if not points:
        # too few readings to look back on: every candidate counts alike
        scores = {m: 0.0 for m in names}
    raw = {m: 1.0 / (scores[m] + EPS) for m in names}
    total = sum(raw.values())
    weights = {m: raw[m] / total for m in names}
    return Scored(t, y, points, final, ests, scores, weights, slowing(t, y, spec))


def slowing(t: np.ndarray, y: np.ndarray, spec: Spec) -> bool:
    """Whether the readings' rate falls over them beyond what one exponential allows: ln k of
    one exponential through the newer half of the readings below the older half's by more than
    SLOWING_Z of their combined standard errors (from the profile intervals, widened by n / n_eff
    for correlated residuals).

    A passive body relaxing toward one ambient is a sum of decaying modes of one sign, whose
    apparent rate -T''/T' only falls as the fast modes die out; and the level-off of the newest
    curve, now + T'/k_apparent = sum(k_i a_i)^2 / sum(k_i^2 a_i) (a_i the modes' amplitudes
    now), is then no more than the change to come, sum(a_i) (Cauchy-Schwarz).  A rate seen to
    fall says such modes are there: a level-off short of the threshold is a lower bound on how
    far the item goes, not a "never"."""
    mid = float(t[0]) + 0.5 * float(t[-1] - t[0])
    old = t <= mid
    if old.sum() < MIN_ORIGIN or (~old).sum() < MIN_ORIGIN:
        return False
    kw = spec.kwargs()
    fits = [fit_lumped(t[sel], y[sel], float(y[-1]), **kw) for sel in (old, ~old)]
    se = []
    for f in fits:
        if not f.ok or not f.k_lo or not f.k_hi or not f.k_per_s > 0:
            return False
        width = math.log(f.k_hi / f.k_lo) / (2.0 * Z90)
        se.append(width / math.sqrt(effective_share(f.residuals)))
    spread = math.hypot(*se)
    if not spread > 0:
        return False  # a rate pinned at the edge of its range: nothing to compare
    return math.log(fits[0].k_per_s / fits[1].k_per_s) / spread > SLOWING_Z


def combine(
    t: np.ndarray, y: np.ndarray, spec: Spec, threshold: float, limit: str | None
) -> Combined:
    """Fit the candidates to (t, y), score them by backtest, and combine (module docstring)."""
    s = score(t, y, spec)
    t, y, final, weights = s.t, s.y, s.final, s.weights
    names = list(weights)
    if not names:
        return Combined(None, None, None, {}, {}, "lumped", 0, final)
    etas = {m: final[m].eta(threshold, limit) for m in names}
    eta, never_clear = _point(
        etas, weights, final, threshold, _overrides_given(spec, final, threshold), s.slowing
    )
    if eta and _moving_away(t, y, threshold):
        # the newest readings clearly move away from the threshold: a curve that crosses it
        # would have to turn back, which nothing in the readings shows
        eta, never_clear = None, True
        etas = {m: None for m in names}
    best = max(weights, key=lambda m: weights[m])
    lo, hi = _interval(eta, etas, weights, s.ests, s.points)
    if eta:
        eta, lo, hi = _with_trend(eta, lo, hi, t, y, threshold, etas, weights, s, spec)
    never_w = sum(weights[m] for m, e in etas.items() if e is None)
    overruled = s.slowing and eta is not None and never_w > 0.5
    return Combined(
        eta,
        lo,
        hi,
        dict(weights),
        dict(s.scores),
        best,
        len(s.points),
        final,
        never_clear,
        overruled,
    )


TREND_SHARE = 0.3  # the trend: a straight line through the newest 30 % of the readings' span


def trend_eta(t: np.ndarray, y: np.ndarray, level: float) -> float | None:
    """Seconds from the newest reading until the straight trend through the newest TREND_SHARE
    of the readings' span (three readings at least) reaches ``level``; None when it is flat or
    moves away."""
    if t.size < 3:
        return None
    window = max(TREND_SHARE * float(t[-1] - t[0]), float(t[-1] - t[-3]))
    return baselines.linear_eta(t, y, level, window_s=window)


def _combined_errors(ests, weights, points) -> list[float]:
    """The combination's own ln errors at the backtest's questions (the weighted median of the
    candidates' ln ETA there; a "never" counts as very late), capped at MISS."""
    errs = []
    names = list(ests)
    for j, p in enumerate(points):
        logs, ws = [], []
        for m in names:
            e = ests[m][j]
            logs.append(math.log(e) if e is not None and e > 0 else 50.0)
            ws.append(weights[m])
        err = _wmedian(logs, ws) - math.log(p.actual)
        errs.append(min(max(err, -MISS), MISS))
    return errs


def _given_holds(spec: Spec, cands: dict[str, Candidate]) -> bool:
    """Whether a given ambient anchors the bend: given exactly, or the one-exponential fit's
    ambient within 2 sd of it (the readings do not contradict it)."""
    if spec.ambient is None:
        return False
    if spec.ambient_sd <= 0:
        return True
    lumped = cands.get("lumped")
    if not isinstance(lumped, Lumped) or not lumped.ok:
        return False
    return abs(float(lumped.fit.ambient) - spec.ambient) <= 2.0 * spec.ambient_sd


def _with_trend(eta, lo, hi, t, y, threshold, etas, weights, s: Scored, spec: Spec):
    """The curves' combined ETA pooled with the readings' straight trend, in ln ETA, each
    weighted by the inverse of its variance (the trend's: its mean squared ln error on the
    backtest; the curves': theirs on the same backtest plus the weighted variance of the ln ETA
    of the credible curves that cross), and kept within those curves' ETAs.  Curves that
    forecast the item's past about equally well but disagree about its future say that the bend
    ahead is weakly supported: the forecast then leans toward the credible curve nearest the
    trend, the answer that assumes least; a well-supported bend (one credible curve, several
    that agree, or a given ambient the readings do not contradict, which says where the curve
    is heading) keeps it.  The interval is stretched to hold the pooled point."""
    credible = {m: e for m, e in etas.items() if e is not None and e > 0}
    credible = {m: e for m, e in credible.items() if weights[m] >= CREDIBLE}
    if len(credible) < 2 or not s.points or _given_holds(spec, s.final):
        return eta, lo, hi
    trend = trend_eta(t, y, threshold)
    if trend is None or not trend > 0:
        return eta, lo, hi
    theirs = [log_error(trend_eta(t[: p.n], y[: p.n], p.level), p.actual) for p in s.points]
    # a straight trend misses the bend ahead, an error that grows in proportion to the reach (its
    # variance with the square), where the curves' errors grow like the conformal band's (the
    # square root): the trend's backtest variance is scaled up by the forecast's reach over the
    # backtest's typical one
    reach = max(1.0, eta / float(np.median([p.actual for p in s.points])))
    v_trend = (float(np.mean(np.square(theirs))) + FLOOR**2) * reach
    mine = _combined_errors(s.ests, weights, s.points)
    w = np.array([weights[m] for m in credible])
    w = w / w.sum()
    ln = np.log(np.array(list(credible.values())))
    spread = float(w @ np.square(ln - float(w @ ln)))
    v_mine = float(np.mean(np.square(mine))) + FLOOR**2 + spread
    share = v_mine / (v_mine + v_trend)
    pooled = (1.0 - share) * math.log(eta) + share * math.log(trend)
    eta = math.exp(min(max(pooled, float(ln.min())), float(ln.max())))
    if lo is not None:
        lo = min(lo, eta)
    if hi is not None:
        hi = max(hi, eta)
    return eta, lo, hi


def _moving_away(t: np.ndarray, y: np.ndarray, threshold: float) -> bool:
    """Whether the newest half of the readings clearly moves away from the threshold (their
    straight trend's slope beyond 3 se, pointing away from it)."""
    from thermeta.predictors.carry import moves_away

    sel = t >= t[-1] - 0.5 * float(t[-1] - t[0])
    return bool(sel.sum() >= 3 and moves_away(t[sel], y[sel], threshold))


def _score(ests: list[float | None], points: list[Point]) -> float:
    return float(np.mean([log_error(e, p.actual) ** 2 for e, p in zip(ests, points)]))


def _wmedian(values: list[float], weights: list[float]) -> float:
    order = np.argsort(values)
    v = np.asarray(values, float)[order]
    c = np.cumsum(np.asarray(weights, float)[order])
    return float(v[int(np.searchsorted(c, 0.5 * c[-1]))])


def _overrides_given(spec: Spec, cands: dict[str, Candidate], thr: float) -> bool:
    """Whether a "never" would override a given ambient that lies beyond the threshold without
    the readings contradicting it (the one-exponential fit's ambient within 2 sd of it): the
    user says the item is heading past the threshold, and the readings do not say otherwise."""
    lumped = cands.get("lumped")
    if spec.ambient is None or spec.ambient_sd <= 0 or not isinstance(lumped, Lumped):
        return False
    if not lumped.ok:
        return False
    now = float(lumped.fit.value_fit_now)
    beyond = (spec.ambient - thr) * (thr - now) > 0
    return beyond and abs(float(lumped.fit.ambient) - spec.ambient) <= 2.0 * spec.ambient_sd


def _point(
    etas: dict[str, float | None],
    weights: dict[str, float],
    cands,
    thr: float,
    keep_given: bool = False,
    slows: bool = False,
) -> tuple[float | None, bool]:
    """The weighted median of ln ETA; "never" only when clear (module docstring), not against
    a given ambient the readings do not contradict (``keep_given``), and not when the readings'
    rate falls beyond one exponential (``slows``: a level-off is then a lower bound)."""
    never = [m for m, e in etas.items() if e is None]
    finite = [m for m, e in etas.items() if e is not None]
    w_never = sum(weights[m] for m in never)
    clear = (
        w_never > 0.5
        and not slows
        and all(_clear_level_off(cands[m], thr) for m in never)
        and not (keep_given and finite)
    )
    if clear:
        return None, clear
    if not finite:
        # no curve crosses, but not all of them level off clearly short of the threshold: the
        # local curve with less of its bend kept, the most that crosses (down to its trend)
        local = cands.get("local")
        if local is None or not local.ok:
            return None, False
        for c in sorted(BENDS, reverse=True):
            if c <= local.bend:
                e = local.eta(thr, None, bend=c)
                if e is not None:
                    return e, False
        return None, False
    if any(etas[m] == 0.0 for m in finite):
        past = sum(weights[m] for m in finite if etas[m] == 0.0)
        if past >= 0.5 * sum(weights[m] for m in finite):
            return 0.0, False
    logs = [math.log(max(float(etas[m] or 0.0), 1e-9)) for m in finite]
    return math.exp(_wmedian(logs, [weights[m] for m in finite])), False


def _clear_level_off(cand: Candidate, thr: float) -> bool:
    """Whether a candidate that never crosses levels off short of the threshold by more than
    NEVER_MARGIN of the way left, or moves away from it (a curve that stops just short of it
    is within what a second time constant or a drifting room does to a curve)."""
    now = _value_now(cand)
    asym = _asymptote(cand)
    if now is None or asym is None:
        return True
    left = thr - now
    if left == 0:
        return False
    short = (thr - asym) / left  # > 0: the level-off lies short of the threshold
    return short > NEVER_MARGIN or (asym - now) * left < 0


def _value_now(cand: Candidate) -> float | None:
    f = getattr(cand, "fit", None)
    return None if f is None else float(f.value_fit_now)


def _asymptote(cand: Candidate) -> float | None:
    if isinstance(cand, Local):
        k = cand.bend * cand.fit.k_per_s
        return None if k <= 0 else cand.now + cand.slope / k
    f = getattr(cand, "fit", None)
    if f is None:
        return None
    if hasattr(f, "bend_kept"):
        k = f.bend_kept * f.k_per_s
        if f.trend_now is not None or k <= 0:
            return None
        span = f.t_last - f.t_first
        slope = -f.k_per_s * f.amplitude * math.exp(-f.k_per_s * span)
        return f.value_fit_now + slope / k
    return float(f.ambient)


def _interval(eta, etas, weights, ests, points) -> tuple[float | None, float | None]:
    """Conformal band in ln ETA from the combination's own backtest errors (module docstring)."""
    never_w = sum(weights[m] for m, e in etas.items() if e is None)
    if eta is None:
        finite = [e for m, e in etas.items() if e is not None and weights[m] >= CREDIBLE]
        return (min(finite) if finite else math.inf), None
    if eta == 0.0:
        return 0.0, 0.0
    errs = _combined_errors(ests, weights, points)
    horizons = [p.actual for p in points]
    rms = math.sqrt(float(np.mean(np.square(errs))) + FLOOR**2) if errs else 1.0
    # the rms of a handful of backtest errors is itself uncertain: Student's t, not the normal
    q = float(t_ppf(0.95, len(errs) - 1)) if len(errs) > 1 else 2 * Z90
    # errors grow with the reach: scale by the forecast's reach over the backtest's typical one
    if horizons:
        rms *= max(1.0, math.sqrt(eta / float(np.median(horizons))))
    lo, hi = eta * math.exp(-q * rms), eta * math.exp(q * rms)
    credible = [e for m, e in etas.items() if e is not None and weights[m] >= CREDIBLE]
    if credible:
        lo, hi = min(lo, min(credible)), max(hi, max(credible))
    return lo, (None if never_w >= OPEN_SHARE else hi)
