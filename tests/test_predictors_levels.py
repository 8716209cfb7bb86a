"""Several levels of one probe from one series (predictors.forecast_levels, predictors.shared):
each answer is exactly the lone forecast's, and the threshold-free fits are made once."""

from __future__ import annotations

import json

import numpy as np
import pytest
from thermeta.predictors import combine as combine_mod
from thermeta.predictors import forecast, forecast_levels
from thermeta.predictors.shared import shared_fits

ROOT_DATA = "tests/data/realdata"
T0_EPOCH = 1_700_000_000.0


def _json(fc) -> str:
    return json.dumps(fc.to_dict(), sort_keys=True, default=str)


def _fridge() -> tuple[np.ndarray, np.ndarray]:
    """A small fridge pulling down from room temperature (cellularmitosis/logs, MIT; its JSON
    beside the CSV): its first 400 readings, where one time constant does not explain them."""
    data = np.genfromtxt(
        f"{ROOT_DATA}/cm_minifridge_pulldown.csv", delimiter=",", names=True, max_rows=400
    )
    return data["time"], data["value"]


@pytest.mark.parametrize("case", ["real_fridge", "newton_given_ambient"])
def test_each_level_gets_exactly_its_lone_forecast(case):
    """A limit, a target and a stage asked of one window give, field for field, the forecasts
    made one threshold at a time (the combined candidates on a real record; the lumped fit
    with a given ambient on Newton's law with seeded scatter)."""
    if case == "real_fridge":
        t, y = _fridge()
        kw: dict = {}
        questions = [(17.0, "lower"), (14.0, "lower"), (20.0, None)]
    else:
        x = np.arange(0, 5400.1, 60.0)
        rng = np.random.default_rng(4)
        y = 25 + (4 - 25) * np.exp(-x / 9000) + rng.normal(0, 0.1, x.size)
        t, kw = x + T0_EPOCH, {"ambient": 25.0}
        questions = [(8.0, "upper"), (12.0, "upper"), (3.0, "lower")]
    many = forecast_levels(t, y, questions, **kw)
    alone = [forecast(t, y, thr, limit=limit, **kw) for thr, limit in questions]
    assert [_json(a) for a in many] == [_json(b) for b in alone]
    assert any(fc.eta_s is not None for fc in many)


def test_the_candidates_are_fitted_once_for_all_levels(monkeypatch):
    """The candidates' fits (the backtest's, the costly part) run as often for three levels as
    for one; outside the shared block nothing is kept."""
    t, y = _fridge()
    calls = []
    real = combine_mod.fit_all

    def counting(*args, **kwargs):
        calls.append(1)
        return real(*args, **kwargs)

    monkeypatch.setattr(combine_mod, "fit_all", counting)
    forecast(t, y, 17.0, limit="lower")
    one = len(calls)
    assert one > 0
    calls.clear()
    forecast_levels(t, y, [(17.0, "lower"), (14.0, "lower"), (15.5, "lower")])
    assert len(calls) == one
    calls.clear()
    forecast(t, y, 17.0, limit="lower")
    forecast(t, y, 14.0, limit="lower")
    assert len(calls) == 2 * one
    with shared_fits():
        forecast(t, y, 17.0, limit="lower")
        with shared_fits():  # a nested block shares the outer one's
            forecast(t, y, 14.0, limit="lower")
    assert len(calls) == 3 * one


def test_threshold_and_limit_belong_to_the_questions():
    """A threshold or limit among the shared arguments is a mistake, said at once."""
    with pytest.raises(ValueError, match="questions"):
        forecast_levels([0.0, 60.0], [1.0, 2.0], [(5.0, None)], limit="upper")
