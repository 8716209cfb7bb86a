"""The combination's pooling with the straight trend (predictors.combine._with_trend): logic on
hand-made candidates and backtests."""

from __future__ import annotations

import math

import numpy as np
import pytest
from thermeta.predictors.candidates import Spec
from thermeta.predictors.combine import Point, Scored, _with_trend, trend_eta


def _scored(t, y, ests, points):
    return Scored(t, y, points, {}, ests, {m: 0.0 for m in ests}, {}, False)


def _line(n=60, slope=0.01):
    t = np.arange(float(n)) * 10.0
    return t, 5.0 + slope * t


def test_trend_eta_is_the_straight_line_through_the_newest_readings():
    t, y = _line()
    # the newest reading 5 + 0.01 * 590 = 10.9 reaches 12 in (12 - 10.9) / 0.01 = 110 s
    assert trend_eta(t, y, 12.0) == pytest.approx((12.0 - y[-1]) / 0.01)
    assert trend_eta(t, y, 2.0) is None  # moving away


def _backtest(t, y, spread_errors):
    """Questions whose true answers the straight line gets right, and candidates whose answers
    are off by the given ln errors."""
    points, ests = [], {"a": [], "b": []}
    for n in (20, 30, 40):
        level = float(y[n + 10])
        actual = float(t[n + 10] - t[n - 1])
        points.append(Point(n, level, actual))
        ests["a"].append(actual * math.exp(spread_errors))
        ests["b"].append(actual * math.exp(-spread_errors))
    return points, ests


def test_disagreeing_credible_curves_lean_toward_the_trend_within_their_range():
    t, y = _line()
    thr = 12.0
    trend = trend_eta(t, y, thr)
    points, ests = _backtest(t, y, 0.2)
    s = _scored(t, y, ests, points)
    etas = {"a": 4.0 * trend, "b": 1.2 * trend}
    weights = {"a": 0.55, "b": 0.45}
    eta0 = etas["a"]  # the weighted median
    eta, lo, hi = _with_trend(eta0, 0.5 * trend, 8.0 * trend, t, y, thr, etas, weights, s, Spec())
    # the trend backtests perfectly (a straight line), the curves by 0.2 in ln and they
    # disagree by ln 4 / 1.2: the point goes all the way to the curve nearest the trend
    assert eta == pytest.approx(etas["b"])
    assert lo <= eta <= hi


def test_one_credible_curve_keeps_its_forecast():
    t, y = _line()
    thr = 12.0
    trend = trend_eta(t, y, thr)
    points, ests = _backtest(t, y, 0.2)
    s = _scored(t, y, ests, points)
    etas = {"a": 3.0 * trend, "b": None}
    weights = {"a": 0.7, "b": 0.3}
    eta, lo, hi = _with_trend(etas["a"], trend, 6 * trend, t, y, thr, etas, weights, s, Spec())
    assert eta == etas["a"] and (lo, hi) == (trend, 6 * trend)


def test_agreeing_curves_barely_move():
    """Credible curves that agree and backtest better than the trend: the point moves by less
    than a tenth of the way (in ln) toward the trend."""
    t = np.arange(60.0) * 10.0
    y = 20.0 - 15.0 * np.exp(-t / 400.0)  # bends: the straight line forecasts early
    thr = 19.0
    trend = trend_eta(t, y, thr)
    points = []
    ests = {"a": [], "b": []}
    for n in (20, 30, 40):
        actual = float(t[n + 10] - t[n - 1])
        points.append(Point(n, float(y[n + 10]), actual))
        ests["a"].append(actual * 1.02)
        ests["b"].append(actual * 0.98)
    s = _scored(t, y, ests, points)
    true = -400.0 * math.log((20.0 - thr) / 15.0) - t[-1]
    etas = {"a": true * 1.05, "b": true * 0.95}
    weights = {"a": 0.5, "b": 0.5}
    eta, _, _ = _with_trend(etas["a"], None, None, t, y, thr, etas, weights, s, Spec())
    assert trend < etas["b"]
    moved = math.log(etas["a"] / eta) / math.log(etas["a"] / trend)
    assert 0.0 <= moved < 0.1


def test_a_given_ambient_exactly_known_keeps_the_curves_forecast():
    """With the ambient given exactly the curves know where they are heading: no pooling."""
    t, y = _line()
    thr = 12.0
    trend = trend_eta(t, y, thr)
    points, ests = _backtest(t, y, 0.2)
    s = _scored(t, y, ests, points)
    etas = {"a": 4.0 * trend, "b": 1.2 * trend}
    weights = {"a": 0.55, "b": 0.45}
    spec = Spec(ambient=30.0, ambient_sd=0.0)
    eta, lo, hi = _with_trend(etas["a"], None, None, t, y, thr, etas, weights, s, spec)
    assert (eta, lo, hi) == (etas["a"], None, None)
