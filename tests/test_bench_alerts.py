"""The alerting bench (scripts/bench_alerts.py): its quick path runs end to end through the
forecast, the refitter's state and the alert rules, and its tables are whole.

Structure and bookkeeping only; the figures themselves are what the bench reports.
"""

from __future__ import annotations

import importlib.util
import math
import sys
from pathlib import Path

import numpy as np
import pytest

ROOT = Path(__file__).resolve().parent.parent


@pytest.fixture(scope="module")
def bench():
    spec = importlib.util.spec_from_file_location(
        "bench_alerts", ROOT / "scripts" / "bench_alerts.py"
    )
    mod = importlib.util.module_from_spec(spec)
    sys.modules["bench_alerts"] = mod
    spec.loader.exec_module(mod)
    return mod


def test_quick_run_gives_every_trace_kind(bench):
    """A quick run returns a result per trace, with finite item-weeks and lead times that are
    None or between 0 and the time from the event to the crossing."""
    results, _ = bench.run_all(bench.QUICK_CASES, bench.QUICK_NORMAL_DAYS, seed=5)
    kinds = {r["kind"] for r in results}
    assert kinds == {"normal", "busy", *bench.EVENTS}
    for r in results:
        if "skipped" in r:
            continue
        if r["kind"] == "busy":
            # the delay can only take alerts away: each level no more often than without it
            assert r["openings"] > 0 and 0 <= r["past"] <= r["openings"]
            assert all(r["delayed"][lv] <= r["plain"][lv] for lv in r["plain"])
            continue
        assert math.isfinite(r["item_weeks"]) and r["item_weeks"] > 0
        assert r["false"] >= 0
        if r["kind"] != "normal" and r["lead_s"] is not None:
            assert 0.0 <= r["lead_s"] <= r["event_to_cross_s"]
    lines = bench.table(results)
    text = "\n".join(lines)
    for kind in bench.EVENTS:
        assert f"| {kind} |" in text
    assert "per item-week" in text
    assert "| 1 trace |" in text and "with delay = 15 min" in text


def test_false_alert_needs_a_safe_truth(bench):
    """An alert counts as false only when the noise-free curve stays below the threshold around
    it: a curve that crosses 8 degC within the lead makes the alert a true one."""
    t0 = bench.synth.T_START
    flat = lambda x: np.full(np.shape(x), 3.0)
    ramp = lambda x: 3.0 + np.asarray(x, float) / 600.0  # +1 degC per 10 min
    alerts = [(t0 + 3600.0, "approaching")]
    assert bench.n_false(alerts, flat, 8.0) == 1
    assert bench.n_false(alerts, ramp, 8.0) == 0


def test_sawtooth_period(bench):
    """The thermostat's k gives the drawn period: off plus on time (Newton's law each way)."""
    p = {"mid": 3.5, "half_swing": 1.5, "warm": 20.0, "coil": -8.0, "period_s": 1800.0}
    k = bench.sawtooth_k(p)
    off = math.log((20.0 - 2.0) / (20.0 - 5.0)) / k
    on = math.log((5.0 + 8.0) / (2.0 + 8.0)) / k
    assert off + on == pytest.approx(1800.0)


def test_defrost_signal_is_the_controllers_on_and_off(bench):
    """The bench tells the probes of each defrost as the controller would: on at the start of each
    defrost piece, off when its timer ends it; after a power failure cut it, no off arrives."""
    rng = np.random.default_rng([2026, 0, 0])
    p = bench.draw(bench.ROOM, rng)
    pieces = bench.room_pieces(p, 2 * bench.DAY, rng)
    starts = [q[0] for q in pieces if q[1] == p["defrost_drive"]]
    assert len(starts) >= 5  # every 6-8 h over two days
    sig = bench.defrost_signal(pieces, p)
    assert sig == [x for s in starts for x in ((s, 1.0), (s + p["defrost_s"], 0.0))]
    cut = starts[-1] + 60.0
    assert bench.defrost_signal(pieces, p, cut, off_at_cut=False)[-1] == (starts[-1], 1.0)
    timer_end = (starts[-1] + p["defrost_s"], 0.0)
    assert bench.defrost_signal(pieces, p, cut, off_at_cut=True)[-1] == timer_end
