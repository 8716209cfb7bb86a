"""Faults 16-20 of the injection campaign: answers and messages that were wrong or missing.
(Faults 14 and 15 are pinned in tests/test_one_truth.py.)"""

from __future__ import annotations

import json
import subprocess
import sys
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

CELLAR = '[[item]]\nname = "{2}"\ntopic = "cellar/+/core"\nthreshold = 8.0\nambient = 20.0\n'


def _retained(broker, topic: str) -> dict | None:
    r = subprocess.run(
        ["mosquitto_sub", "-h", broker.host, "-p", str(broker.port), "-t", topic, "-C", "1"]
        + ["-W", "2"],
        capture_output=True,
        text=True,
    )
    return json.loads(r.stdout) if r.returncode == 0 and r.stdout.strip() else None


@pytest.mark.broker
def test_fault16_a_second_daemon_on_the_same_store_refuses_to_start(broker, tmp_path):
    """Started twice with one config, the two flapped (each kicking the other off the broker)
    with no hint.  The second now refuses with a clear message and exit code 1, and the first
    goes on storing readings; each instance's status is retained on its own topic."""
    url = f"sqlite:///{tmp_path / 'store.db'}"
    cfg = write_config(tmp_path, broker, db_url=url, items=CELLAR, refit_every=60)
    t0 = time.time() - 600
    with RunningDaemon(cfg) as first:
        time.sleep(1.0)  # its first heartbeat is in the store
        second = subprocess.run(
            [sys.executable, "-m", "thermeta.daemon.cli", "run", "--config", str(cfg)],
            capture_output=True,
            text=True,
            timeout=60,
            cwd=tmp_path,
        )
        assert second.returncode == 1, second.stderr[-2000:]
        assert "already running" in second.stderr, second.stderr[-2000:]
        assert str(first.proc.pid) in second.stderr
        publish(broker, readings("cellar/tank-1/core", t0, 10))
        wait_for(lambda: count_readings(url, "tank-1") == 10, 10, first.log)
        status = _retained(broker, "thermeta/status/thermeta-test")
        assert status and status["state"] == "online"
        assert "took over" not in first.text() and "refused" not in first.text()
    assert _retained(broker, "thermeta/status/thermeta-test")["state"] == "offline"


@pytest.mark.broker
def test_fault16_a_kill_9_does_not_block_the_next_start(broker, tmp_path):
    """The check reads the last heartbeat's process: one that is gone does not count."""
    url = f"sqlite:///{tmp_path / 'store.db'}"
    cfg = write_config(tmp_path, broker, db_url=url, items=CELLAR, refit_every=60)
    d = RunningDaemon(cfg).start()
    time.sleep(1.0)
    d.kill9()
    with RunningDaemon(cfg) as again:
        publish(broker, readings("cellar/tank-1/core", time.time() - 600, 3))
        wait_for(lambda: count_readings(url, "tank-1") == 3, 10, again.log)


@pytest.mark.broker
def test_fault16_a_second_daemon_with_the_same_client_id_is_named(broker, tmp_path):
    """Two stores, one client id: each connect throws the other off the broker (Mosquitto closes
    the older connection without a reason), and each says in one line that another client is
    using its client id, naming it."""
    a, b = tmp_path / "a", tmp_path / "b"
    a.mkdir()
    b.mkdir()
    cfg_a = write_config(a, broker, items=CELLAR, refit_every=60)
    cfg_b = write_config(b, broker, items=CELLAR, refit_every=60)
    with RunningDaemon(cfg_a) as first:
        with RunningDaemon(cfg_b, wait_connected=False) as second:
            wait_for(lambda: "took over client id thermeta-test" in first.text(), 15, first.log)
            wait_for(lambda: "took over client id thermeta-test" in second.text(), 15, second.log)
            time.sleep(2)
        text = first.text()
    assert text.count("took over client id") == 1, text[-3000:]
