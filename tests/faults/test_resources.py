"""Faults 9-13 of the injection campaign: memory, log volume, and time a fault could run away
with.  `thermeta run` as a process against a real Mosquitto and SQLite."""

from __future__ import annotations

import time

import pytest
from thermeta.daemon.testing import (
    RunningDaemon,
    count_readings,
    publish,
    readings,
    wait_for,
    write_config,
)

pytestmark = pytest.mark.broker

CELLAR = '[[item]]\nname = "{2}"\ntopic = "cellar/+/core"\nthreshold = 8.0\nambient = 20.0\n'


def _peak_rss_mb(pid: int) -> float:
    for line in open(f"/proc/{pid}/status"):
        if line.startswith("VmHWM:"):
            return int(line.split()[1]) / 1024
    raise AssertionError("no VmHWM")


def test_fault09_a_huge_payload_costs_the_daemon_no_memory(broker, tmp_path):
    """A 40 MB payload (everything over 16 KiB is refused anyway) raised the daemon's peak RSS
    by about 3x its size; announced as too big to the broker (MQTT 5 Maximum Packet Size), it
    is never sent to us, and the readings around it are stored."""
    url = f"sqlite:///{tmp_path / 'store.db'}"
    cfg = write_config(tmp_path, broker, db_url=url, items=CELLAR, refit_every=60)
    t0 = time.time() - 600
    with RunningDaemon(cfg) as d:
        publish(broker, readings("cellar/tank-1/core", t0, 5))
        wait_for(lambda: count_readings(url, "tank-1") == 5, 10, d.log)
        before = _peak_rss_mb(d.proc.pid)
        publish(broker, [("cellar/tank-1/core", b"[" + b" " * 40_000_000 + b"]")])
        publish(broker, readings("cellar/tank-1/core", t0, 5, start=5))
        wait_for(lambda: count_readings(url, "tank-1") == 10, 15, d.log)
        grown = _peak_rss_mb(d.proc.pid) - before
    assert grown < 15, f"peak RSS grew {grown:.0f} MB for one 40 MB payload"
