"""The campaign's no-loss figures, short form: readings counted, each stored exactly once."""

from __future__ import annotations

import subprocess
import time

import pytest
from conftest import IN_CI
from sqlalchemy import create_engine, text
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


@pytest.fixture
def small_disk(tmp_path):
    """A 4 MB tmpfs (needs the right to mount; skipped where the machine does not allow it)."""
    disk = tmp_path / "disk"
    disk.mkdir()
    got = subprocess.run(
        ["mount", "-t", "tmpfs", "-o", "size=4m", "tmpfs", str(disk)], capture_output=True
    )
    if got.returncode != 0:
        why = got.stderr.decode().strip()[:100]
        if IN_CI:
            pytest.fail(f"CI=true but a tmpfs cannot be mounted: {why}")
        pytest.skip(f"cannot mount a tmpfs here: {why}")
    yield disk
    subprocess.run(["umount", "-l", str(disk)], capture_output=True)


def _distinct(url: str) -> int:
    eng = create_engine(url)
    try:
        with eng.connect() as conn:
            q = "SELECT count(*) FROM (SELECT DISTINCT item_id, ts FROM readings) d"
            return int(conn.execute(text(q)).scalar_one())
    finally:
        eng.dispose()


def test_a_full_disk_loses_no_reading(broker, tmp_path, small_disk):
    """The store's disk fills up while readings arrive: nothing more is stored or acknowledged,
    the daemon keeps running, and once space is freed every reading is stored exactly once."""
    url = f"sqlite:///{small_disk / 'store.db'}"
    cfg = write_config(tmp_path, broker, db_url=url, items=CELLAR, refit_every=60)
    t0 = time.time() - 3600
    with RunningDaemon(cfg) as d:
        publish(broker, readings("cellar/tank-1/core", t0, 100))
        wait_for(lambda: count_readings(url, "tank-1") == 100, 10, d.log)
        filler = small_disk / "filler"
        subprocess.run(
            ["dd", "if=/dev/zero", f"of={filler}", "bs=64k"], capture_output=True, check=False
        )
        publish(broker, readings("cellar/tank-1/core", t0, 2000, start=100))
        wait_for(lambda: "full" in d.text(), 15, d.log)
        assert count_readings(url, "tank-1") < 2100
        filler.unlink()
        wait_for(lambda: count_readings(url, "tank-1") == 2100, 40, d.log)
        assert d.proc is not None and d.proc.poll() is None
    assert _distinct(url) == 2100
