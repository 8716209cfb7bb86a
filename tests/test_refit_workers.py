"""The refit round's worker processes (daemon/refit/workers.py, ``[fit] workers``): a round whose
chunks are fitted in real worker processes (the items the batch flags fitted there the per-item
way) publishes what the in-process round does; a worker
killed (SIGKILL) costs neither the round nor the service (its chunk goes the per-item way,
counted, and the next chunk gets a fresh worker); an item the batch raises on comes back
flagged while the rest of its chunk is fitted."""

from __future__ import annotations

import dataclasses
import json
import os
import signal
import time

import numpy as np
import pytest
from test_batch import same, warming
from thermeta.daemon.refit.workers import FitPool
from thermeta.predictors.batch import Flag, Prepared, Series, prepare


def _items(n: int) -> tuple[str, dict]:
    text, series = "", {}
    for i in range(n):
        name = f"load-{i:02d}"
        ambient = "ambient = 25.0\n" if i % 2 else ""
        text += f'[[item]]\nname = "{name}"\ntopic = "s/{name}"\nthreshold = 8.0\n{ambient}'
        series[name] = warming(i, hours=1.0)
    return text, series


def _refitter(cfg, store, act, now, workers: int, got: dict):
    from thermeta.daemon.clock import ManualClock
    from thermeta.daemon.refit.rounds import Refitter

    cfg = dataclasses.replace(cfg, fit=cfg.fit.model_copy(update={"workers": workers}))
    rf = Refitter(
        store, cfg, ManualClock(now), act, publish=lambda n, p: got.update({n: json.loads(p)})
    )
    rf.batch.chunk = 3  # several chunks in a small round: the workers get the ones ahead
    return rf


@pytest.fixture
def worker_round(tmp_path):
    """A refitter with one worker process over nine warming loads on a real SQLite store, and
    the forecasts it publishes (by item); its worker and store closed afterwards."""
    from test_daemon import seeded_store

    text, series = _items(9)
    cfg, store, act = seeded_store(tmp_path, text, series)
    now = max(float(t.max()) for t, _ in series.values()) + 30.0
    got: dict[str, dict] = {}
    rf = _refitter(cfg, store, act, now, 1, got)
    try:
        yield rf, got
    finally:
        rf.batch.close()
        store.close()


def test_a_round_fitted_in_worker_processes_publishes_what_the_in_process_one_does(tmp_path):
    from test_daemon import seeded_store

    text, series = _items(9)
    now = max(float(t.max()) for t, _ in series.values()) + 30.0
    runs = {}
    for workers in (0, 1):  # each on a store of its own (a round teaches the items' priors)
        (tmp_path / str(workers)).mkdir()
        cfg, store, act = seeded_store(tmp_path / str(workers), text, series)
        got: dict[str, dict] = {}
        rf = _refitter(cfg, store, act, now, workers, got)
        try:
            states = rf.run_once(force=True)
            runs[workers] = (states, got, rf.batch.counts.copy())
            if workers:
                assert rf.batch.pool is not None and rf.batch.pool.generation == 1
                assert rf.batch.pool.crashes == 0
        finally:
            rf.batch.close()
            store.close()
    (s0, b0, c0), (s1, b1, c1) = runs[0], runs[1]
    assert s1 == s0 and len(s1) == 9
    for name in s1:
        assert b1[name]["state"] == b0[name]["state"]
        assert same(b1[name].get("eta_s"), b0[name].get("eta_s")), name
    assert c1["batch"] == c0["batch"] >= 7, (
        c0,
        c1,
    )  # the workers' fits were used, not the per-item way
    assert c1["worker_lost"] == 0
    # what the batch flagged, the worker fitted the per-item way with the round's arguments
    assert c1["item"] >= 1 and c1["item_in_worker"] == c1["item"] and c0["item_in_worker"] == 0


def test_a_killed_worker_costs_neither_the_round_nor_the_service(worker_round):
    """SIGKILL to the worker between rounds: the next round publishes every item (the lost
    chunk the per-item way), counts the crash, and its later chunks get a fresh pool; the round
    after that goes the batch way again."""
    rf, got = worker_round
    assert len(rf.run_once(force=True)) == 9
    pool = rf.batch.pool
    assert pool is not None
    pids = pool.pids()
    assert pids
    for pid in pids:
        os.kill(pid, signal.SIGKILL)
    deadline = time.monotonic() + 10
    while pool.pids() and time.monotonic() < deadline:
        time.sleep(0.05)
    got.clear()
    before = rf.batch.counts.copy()
    states = rf.run_once(force=True)
    assert len(states) == 9 and set(got) == set(states)  # every item published
    assert pool.crashes >= 1 and pool.generation >= 2  # counted, a fresh pool started
    lost = rf.batch.counts["worker_lost"] - before["worker_lost"]
    assert 1 <= lost <= 3  # the one chunk the dead worker held
    gen = pool.generation
    batched = rf.batch.counts["batch"]
    assert len(rf.run_once(force=True)) == 9
    assert rf.batch.counts["batch"] - batched >= 7 and pool.generation == gen


def test_a_hung_worker_costs_its_chunk_the_batch_not_the_round(worker_round):
    """A worker stopped (SIGSTOP: alive, silent) while the round waits on it: after the pool's
    timeout its chunk goes the per-item way, the stopped process is ended, every item is
    published, and the next round has a fresh worker."""
    rf, got = worker_round
    assert len(rf.run_once(force=True)) == 9
    pool = rf.batch.pool
    assert pool is not None
    pool.timeout_s = 1.0
    (pid,) = pool.pids()
    os.kill(pid, signal.SIGSTOP)
    got.clear()
    t0 = time.monotonic()
    states = rf.run_once(force=True)
    assert len(states) == 9 and set(got) == set(states)
    assert time.monotonic() - t0 < 30.0  # not stalled on the silent worker
    assert pool.timeouts >= 1 and rf.batch.counts["worker_lost"] >= 1
    deadline = time.monotonic() + 10
    while time.monotonic() < deadline:
        try:
            os.kill(pid, 0)
            with open(f"/proc/{pid}/stat") as fh:
                if fh.read().rsplit(")", 1)[1].split()[0] == "Z":
                    break  # ended, not yet reaped
        except (ProcessLookupError, FileNotFoundError):
            break
        time.sleep(0.05)
    else:
        raise AssertionError("the hung worker was not ended")
    assert pid not in pool.pids()


def test_an_item_the_batch_raises_on_is_flagged_and_its_chunk_fitted():
    """In a real worker: one series whose readings and times differ in length (the batch
    raises on it) comes back Flag.ERROR; the other items' fits are those made in process."""
    good = [Series(*warming(i), ambient=25.0 if i % 2 else None) for i in range(6)]
    t, y = warming(7)
    bad = Series(t, y[:-1])
    pool = FitPool(1, 60.0)
    try:
        fut, gen = pool.submit([*good[:3], bad, *good[3:]])
        got = pool.result(fut, gen, [])
    finally:
        pool.close()
    assert got is not None and got[3] == Flag.ERROR
    here = prepare(good)
    for a, b in zip([*got[:3], *got[4:]], here):
        assert isinstance(a, Prepared) and isinstance(b, Prepared)
        assert a.fit.k_per_s == pytest.approx(b.fit.k_per_s, rel=1e-12)
        fa, fb = a.forecast(8.0, "upper"), b.forecast(8.0, "upper")
        assert not isinstance(fa, Flag) and not isinstance(fb, Flag)
        assert fa.eta_s == pytest.approx(fb.eta_s, rel=1e-12)
    assert np.array_equal(got[0].s.t, good[0].t)
