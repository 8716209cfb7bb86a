"""When one exponential does not explain the readings: the combined forecast, and the test.

Newton's law with one time constant is the model the lumped forecast is efficient for; real
objects often are not that (a probe in a container, air and load, evaporation early on, a
drifting room).  The test: a two-time-constant fit (predictors.two_exp) against the one-exponential
fit of the same readings, by the F statistic of its two extra parameters,

    F = ((RSS_1 - RSS_2) / 2) / (RSS_2 / dof_2),

with the residuals' lag-one correlation allowed for (F and dof_2 times n_eff / n, see
two_exp.effective_share): one exponential stands unless F passes its 99.9 % point.  When it
fails, predictors.combine chooses and combines the candidate curves by how well they forecast
the item's own readings, and its backtest sets the interval.

Correlated scatter alone (a fast logger, coarse steps) leaves the one-exponential forecast, with
its profile interval widened by n / n_eff when the lag-one correlation is clear (beyond
2 / sqrt(n), the white-noise band).
"""

from __future__ import annotations

import math

import numpy as np
from thermeta.predictors.candidates import Spec
from thermeta.predictors.cleaning import scatter_inflation
from thermeta.predictors.combine import Combined, binned
from thermeta.predictors.context import AmbientMode, Context
from thermeta.predictors.lumped import LumpedFit, fit_lumped
from thermeta.predictors.outcome import NoteCode
from thermeta.predictors.quantiles import f_ppf
from thermeta.predictors.result import Forecast, never_reason
from thermeta.predictors.shared import shared
from thermeta.predictors.two_exp import effective_share, fit_two_exp
from thermeta.predictors.wording import point, step

RICH_MIN = 12  # the fewest readings the two-time-constant test is made on
SHAPE_CONF = 0.999  # one exponential is rejected only on clear evidence
RSS_FLOOR = 1e-7  # residuals below this share of the readings' range are rounding, not misfit
METHOD = (
    "conformal: the combined forecast's own errors in a rolling-origin backtest on the item's "
    "readings, widened with its reach"
)
BASIS = "rolling-origin backtest of each candidate's forecasts of the item's own readings"


def lag_one(residuals: np.ndarray) -> float:
    r = np.asarray(residuals, float) - float(np.mean(residuals))
    den = float(r @ r)
    return float(r[1:] @ r[:-1]) / den if den > 0 else 0.0


def inflation(residuals: np.ndarray) -> float:
    """n / n_eff of residuals whose lag-one correlation is beyond the white-noise band
    (2 / sqrt(n)); 1 otherwise."""
    r = np.asarray(residuals, float)
    if r.size < RICH_MIN or lag_one(r) <= 2.0 / math.sqrt(r.size):
        return 1.0
    return 1.0 / effective_share(r)


@shared
def shape_test(t: np.ndarray, y: np.ndarray, spec: Spec) -> float:
    """The F statistic of two time constants over one (correlation allowed for) divided by its
    SHAPE_CONF point: > 1 means one exponential does not explain the readings."""
    tb, yb = binned(t, y)
    if tb.size < RICH_MIN:
        return 0.0
    one = fit_lumped(tb, yb, float(yb[-1]), intervals=False, **spec.kwargs())
    two = fit_two_exp(tb, yb, **spec.kwargs())
    if not (one.ok and two.ok) or two.rss <= 0:
        return 0.0
    if one.rss <= tb.size * (RSS_FLOOR * float(np.ptp(yb))) ** 2:
        return 0.0  # one exponential explains the readings to rounding: nothing to test
    # the readings' correlation, as the lesser of two estimates: the two-time-constant fit's
    # residuals' (which a misfit inflates) and the binned readings' residuals from a local
    # line (which coarse steps inflate)
    share = max(effective_share(two.residuals), 1.0 / scatter_inflation(tb, yb))
    dof = max(two.dof * share, 1.0)
    F = (one.rss - two.rss) / 2.0 / (two.rss / two.dof) * share
    return float(F / f_ppf(SHAPE_CONF, 2, dof))


CHECK_ORIGIN = 0.5  # the self-check forecasts the newest level from the first half's fit
CHECK_MIN = 20  # readings the first half needs (fewer: its interval is too rough a yardstick)
CHECK_FLOOR = 0.05  # a miss by less than 5 % in time is no evidence against the model
CHECK_WIDEN = 3.2905 / 1.6449  # from the 90 % interval to about the 99.9 % one (normal points)


@shared
def self_check(t: np.ndarray, y: np.ndarray, kw: dict) -> bool:
    """Whether one exponential fitted to the first half of the readings forecast when the
    newest level would be reached outside its own interval widened to about 99.9 %: the readings
    themselves say the curve does not go on as it did (a second time constant, a drifting
    room).  False when there is too little to check with."""
    span = float(t[-1] - t[0])
    n = int(np.searchsorted(t, t[0] + CHECK_ORIGIN * span, side="right"))
    if n < CHECK_MIN or t.size - n < 3:
        return False
    half = 0.02 * span
    level = float(np.mean(y[t >= t[-1] - 2 * half]))
    actual = float(t[-1] - half - t[n - 1])
    check_kw = {k: v for k, v in kw.items() if k != "limit"}
    fit = fit_lumped(t[:n], y[:n], level, **check_kw)
    if not fit.ok or actual <= 0 or abs(level - fit.value_fit_now) < 1e-12:
        return False
    if fit.eta_s is not None and abs(actual - fit.eta_s) <= half:
        # the level is a mean over 2 * half: its time is not known more finely than that
        return False
    if fit.eta_s is None:
        # it saw the curve levelling off short of a level the item then reached
        return fit.eta_lo_s is None or not math.isfinite(fit.eta_lo_s) or fit.eta_lo_s > actual
    if fit.eta_s > 0 and abs(math.log(actual / fit.eta_s)) <= CHECK_FLOOR:
        return False  # within what averaging the newest level over a window does to its time
    lo, hi = fit.eta_lo_s, fit.eta_hi_s
    if lo is None or not lo > 0:
        return hi is not None and actual > hi * math.exp(_widen(fit.eta_s, hi))
    lo_w = lo * math.exp(-_widen(lo, fit.eta_s))
    hi_w = math.inf if hi is None else hi * math.exp(_widen(fit.eta_s, hi))
    return not lo_w <= actual <= hi_w


def _widen(a: float, b: float) -> float:
    """The extra ln-width that takes a 90 % half-interval from a to b to about 99.9 %."""
    if not (a > 0 and b > 0):
        return 0.0
    return abs(math.log(b / a)) * (CHECK_WIDEN - 1.0)


def spec_of(kw: dict) -> Spec:
    """The candidates' ambient and scatter, from fit_lumped's keyword arguments."""
    return Spec(
        ambient=kw.get("ambient"),
        ambient_sd=kw.get("ambient_sd", 0.0) if kw.get("ambient") is not None else 0.0,
        bounds=kw.get("bounds"),
        noise_sd=kw.get("noise_sd") or 0.0,
    )


def combined_forecast(fc: Forecast, comb: Combined, fit1: LumpedFit) -> Forecast:
    """Fill ``fc`` from the candidates' combination (predictors.combine)."""
    fc.eta_s, fc.eta_lo_s, fc.eta_hi_s = comb.eta_s, comb.eta_lo_s, comb.eta_hi_s
    fc.model = comb.best
    fc.model_weights = dict(comb.weights)
    fc.model_basis = f"{BASIS} ({comb.n_points} questions)"
    fc.interval_method = METHOD
    _describe(fc, comb, fit1)
    shares = ", ".join(
        f"{m} {100 * w:.0f} %" for m, w in sorted(comb.weights.items(), key=lambda kv: -kv[1])
    )
    fc.note(
        NoteCode.MODEL_CHOICE,
        f"one time constant does not explain the readings (two fit them better by far), so the "
        f"forecast combines candidate curves by how well each forecast the item's own readings "
        f"so far: {shares}",
    )
    if fc.eta_s is None:
        fc.note(*never_reason(fc))
    return fc


def _describe(fc: Forecast, comb: Combined, fit1: LumpedFit) -> None:
    """Rate and ambient (the one-exponential fit's, with its intervals: what the dashboard and
    the alerts show), direction (the newest readings' trend) and the curve to draw (the
    candidate nearest the combined forecast)."""
    fc.rmse = fit1.sigma
    fc.k_per_s, fc.k_lo_per_s, fc.k_hi_per_s = fit1.k_per_s, fit1.k_lo, fit1.k_hi
    fc.ambient, fc.ambient_lo, fc.ambient_hi = fit1.ambient, fit1.ambient_lo, fit1.ambient_hi
    fc.direction = fit1.direction
    local = comb.candidates.get("local")
    if local is not None and local.ok and local.slope != 0:
        fc.direction = "rising" if local.slope > 0 else "falling"
    nearest = _nearest(comb, fc.threshold)
    fc.params = {**comb.candidates[nearest].params(), "n_fit": float(fit1.n)}


def _nearest(comb: Combined, thr: float) -> str:
    """The candidate whose ETA lies nearest the combined one (in ln ETA)."""
    if comb.eta_s is None or comb.eta_s <= 0:
        return comb.best
    best, gap = comb.best, math.inf
    for m, c in comb.candidates.items():
        if not c.ok or m not in comb.weights:
            continue
        e = c.eta(thr)
        if e is not None and e > 0 and abs(math.log(e / comb.eta_s)) < gap:
            best, gap = m, abs(math.log(e / comb.eta_s))
    return best


def note_ambient_agreement(fc: Forecast, ctx: Context, fitted: float | None) -> None:
    """A given ambient the readings pull more than 2 sd away from is said to be contradicted
    (a note, and the structured flag the alert sentence reads); one held at a stated bound is
    said to be at it."""
    if ctx.mode != AmbientMode.KNOWN or ctx.ambient is None or fitted is None:
        return
    fc.ambient_given = float(ctx.ambient)
    if ctx.ambient_within is not None and abs(fitted - ctx.ambient) >= ctx.ambient_within - 1e-9:
        if ctx.ambient_within > 0:
            fc.note(
                NoteCode.AMBIENT_AT_BOUND,
                "the readings pull the ambient to the edge of the stated bound (+-"
                f"{step(ctx.ambient_within)} around {point(ctx.ambient)}); the fit holds it there",
            )
        return
    if ctx.ambient_sd > 0 and abs(fitted - ctx.ambient) > 2.0 * ctx.ambient_sd:
        fc.ambient_contradicted = True
        fc.note(
            NoteCode.AMBIENT_CONTRADICTED,
            f"the readings disagree with the given ambient {point(ctx.ambient)}: they point to "
            f"{point(fitted, '.3g')}, more than 2 sd away; the given value is kept as a prior "
            "only (state a "
            "bound with --ambient-within / ambient_within to hold it)",
        )
