"""The batched lumped fit (predictors/batch.py) against its reference, the per-item forecast():
on bench_refit's seeded items (Newton's law with 0.05 degC noise and 0.1 degC steps), every item
the batch does not flag gets the same ETA within 1 %, the same interval, the same outcome and
notes; what it must not fit alone (a spike, a door, a second time constant, few readings) it
flags; and a refit round through the batch publishes what a round without it does."""

from __future__ import annotations

import json

import numpy as np
import pytest
from thermeta.daemon.simulation import synth
from thermeta.daemon.simulation.synth import Corruption
from thermeta.predictors import forecast
from thermeta.predictors.batch import Flag, Series, prepare

NOISE = Corruption(noise=0.05, quantum=0.1)


def warming(i: int, *, hours: float = 2.0, noise: Corruption = NOISE):
    """bench_refit's family: a cold load warming toward 12-18 degC, time constant 8-12 h (and a
    faster tenth, 1-3 h, that bends clearly), one reading a minute."""
    rng = np.random.default_rng([7, i])
    tau_h = rng.uniform(1, 3) if i % 10 == 0 else rng.uniform(8, 12)
    s = synth.lumped(
        i,
        T0=rng.uniform(1, 4),
        ambient=rng.uniform(12, 18),
        k_per_s=1 / (3600 * tau_h),
        threshold=8.0,
        duration_s=hours * 3600,
        dt_s=60.0,
        corruption=noise,
    )
    return s.t, s.y


def same(a, b, rel=0.01) -> bool:
    if a is None or b is None:
        return a is b
    return a == pytest.approx(b, rel=rel, abs=1.0)


@pytest.mark.parametrize(
    ("ambient", "threshold", "limit", "within"),
    [
        (25.0, 8.0, "upper", None),
        (None, 8.0, "upper", None),
        (25.0, 0.0, "lower", None),
        (None, 6.0, None, None),
        (20.0, 8.0, "upper", 6.0),
    ],
)
def test_batch_matches_the_per_item_forecast(ambient, threshold, limit, within):
    """Given (with a stated bound, too) or fitted ambient, a limit above or below, or none: each
    item the batch keeps has the per-item forecast's ETA (within 1 %), interval, k, ambient,
    outcome and note codes; an item the per-item way does not fit with one exponential (the
    given 25 degC is contradicted by the faster items) is flagged; of those it does, at least
    four in five are kept (the batch is not a filter that passes nothing)."""
    # (half the items name the threshold up front: its interval comes with the batch)
    series = [
        Series(
            *warming(i),
            ambient=ambient,
            ambient_within=within,
            thresholds=(threshold,) if i % 2 else (),
        )
        for i in range(60)
    ]
    kept = single = 0
    for s, p in zip(series, prepare(series)):
        ref = forecast(s.t, s.y, threshold, ambient=ambient, limit=limit, ambient_within=within)
        got = p if isinstance(p, Flag) else p.forecast(threshold, limit)
        one = ref.model_weights == {"lumped": 1.0} and ref.interval_method == "profile likelihood"
        single += one
        if isinstance(got, Flag):
            continue
        assert one  # what the per-item way does not fit with one exponential, the batch flags
        kept += 1
        assert got.ok == ref.ok and got.reason_code == ref.reason_code
        assert [n.code for n in got.notes] == [n.code for n in ref.notes]
        for key in ("eta_s", "eta_lo_s", "eta_hi_s"):
            assert same(getattr(got, key), getattr(ref, key)), key
        # two optimisers in a flat valley (fitted ambient): k to about 1e-4, the ETA to 1 %
        assert got.k_per_s == pytest.approx(ref.k_per_s, rel=1e-3)
        assert got.ambient == pytest.approx(ref.ambient, abs=1e-2)
        assert (got.direction, got.n_points, got.t_last) == (
            ref.direction,
            ref.n_points,
            ref.t_last,
        )
    assert kept >= 0.8 * single


def test_batch_flags_what_it_must_not_fit_alone():
    """A spike, the surroundings changing half-way (a door left open: the ambient jumps), a second
    time constant (a probe in a container: two exponentials), a dropout in the readings and too
    few readings each go the per-item way, with the reason."""
    t, y = warming(1)
    spiked = y.copy()
    spiked[70] += 8.0
    n = t.size
    door = synth.regime_change(
        3,
        T0=3.0,
        k_per_s=1 / 7200,
        steps=[(0, 5.0), (3600, 20.0), (4500, 5.0)],
        threshold=8.0,
        duration_s=7200.0,
        dt_s=60.0,
        corruption=NOISE,
    )
    x = t - t[0]
    two = 3.0 + 6.0 * (1 - np.exp(-x / 900.0)) + 4.0 * (1 - np.exp(-x / 30000.0))
    two = np.round(two + np.random.default_rng(2).normal(0, 0.02, n), 2)
    gap = np.concatenate([t[:40], t[60:] + 0.0])
    cases = {
        "spike": Series(t, spiked, ambient=25.0),
        "two": Series(t, two, ambient=None),
        "gap": Series(gap, y[np.r_[0:40, 60:n]], ambient=25.0),
        "few": Series(t[:9], y[:9], ambient=25.0),
        "door": Series(door.t, door.y, ambient=None),
    }
    got = dict(zip(cases, prepare(list(cases.values()))))
    assert got["spike"] == Flag.SPIKE
    assert got["two"] in (Flag.POOR_FIT, Flag.DOUBT, Flag.SPIKE)  # the fast bend: off the curve
    assert got["gap"] == Flag.GAP
    assert got["few"] == Flag.TOO_FEW
    assert got["door"] in (Flag.POOR_FIT, Flag.CHANGE, Flag.SPIKE)
    assert not isinstance(prepare([Series(t, y, ambient=25.0)])[0], Flag)  # the plain one is fitted


def test_a_round_through_the_batch_publishes_what_the_per_item_round_does(tmp_path):
    """The refitter's round with the batch (the windows read in one query, the lumped items
    fitted together) and without it (one forecast() per item): the same state and, within 1 %,
    the same ETA for every item, a warning level, a floor below and a bounded ambient included;
    most items went the batch way, and an item with an ambient probe went the per-item way."""
    from test_daemon import seeded_store
    from thermeta.daemon.clock import ManualClock
    from thermeta.daemon.refit.rounds import Refitter

    items, series = "", {}
    for i in range(12):
        name = f"load-{i:02d}"
        ambient = "ambient = 25.0\n" if i % 2 else ""
        if i % 4 == 1:  # a stated bound on the given ambient
            ambient += "ambient_within = 12.0\n"
        levels = (
            '[[item.level]]\nname = "floor"\nthreshold = 0.0\nside = "below"\n'
            if i % 3 == 0
            else ""
        )
        items += (
            f'[[item]]\nname = "{name}"\ntopic = "s/{name}"\nthreshold = 8.0\n{ambient}{levels}'
        )
        series[name] = warming(i)
    items += '[[item]]\nname = "air"\ntopic = "s/air"\nthreshold = 8.0\nambient_topic = "s/air/t"\n'
    series["air"] = warming(99)
    cfg, store, act = seeded_store(tmp_path, items, series)
    now = max(float(t.max()) for t, _ in series.values()) + 30.0
    runs = {}
    for use in (True, False):
        got: dict[str, dict] = {}
        rf = Refitter(
            store,
            cfg,
            ManualClock(now),
            act,
            publish=lambda n, p, got=got: got.update({n: json.loads(p)}),
        )
        rf.use_batch = use
        states = rf.run_once(force=True)
        runs[use] = (states, got, rf.batch.counts)
    (s1, b1, counts), (s0, b0, _) = runs[True], runs[False]
    assert s1 == s0 and len(s1) == 13
    for name in s1:
        for d1, d0 in zip(b1[name]["levels"], b0[name]["levels"]):
            assert d1["state"] == d0["state"]
            assert same(d1.get("eta_s"), d0.get("eta_s")), name
    assert counts["batch"] >= 10 and counts["item"] >= 1
    store.close()


def test_correlated_scatter_is_widened_as_forecast_widens_it():
    """Scatter correlated from one reading to the next (AR(1), lag-one 0.3-0.45: a logger that
    smooths) about one exponential: ``forecast()`` fits one exponential and widens its interval
    by n / n_eff with a note; the batch keeps such items (it does not send them the per-item way
    for the correlation alone) and gives the same ETA, interval and notes."""
    clean = Corruption(noise=0.0)
    series, widened = [], 0
    for i in range(40):
        t, y = warming(i, noise=clean)
        rng = np.random.default_rng([11, i])
        rho = rng.uniform(0.3, 0.45)
        e = np.zeros(t.size)
        for j in range(1, t.size):
            e[j] = rho * e[j - 1] + rng.normal(0.0, 0.04)
        series.append(Series(t, np.round(y + e, 2), ambient=None, thresholds=(8.0,)))
    kept = 0
    for s, p in zip(series, prepare(series)):
        ref = forecast(s.t, s.y, 8.0, limit="upper")
        codes = [n.code for n in ref.notes]
        got = p if isinstance(p, Flag) else p.forecast(8.0, "upper")
        one = ref.model_weights == {"lumped": 1.0} and ref.interval_method == "profile likelihood"
        if isinstance(got, Flag):
            continue
        assert one
        kept += 1
        widened += "correlated_scatter" in codes
        assert [n.code for n in got.notes] == codes
        for key in ("eta_s", "eta_lo_s", "eta_hi_s"):
            assert same(getattr(got, key), getattr(ref, key)), key
    assert kept >= 20 and widened >= 10  # most are kept, and most of those were widened
