"""Faults 1-2 of the injection campaign: what stopped ingest or the scheduled work.

Each test runs `thermeta run` as a process against a real Mosquitto and a real store."""

from __future__ import annotations

import json
import os
import time

import pytest
from sqlalchemy import create_engine, text
from thermeta.daemon.testing import (
    RunningDaemon,
    Sensors,
    count_readings,
    dead_letter_reasons,
    publish,
    readings,
    wait_for,
    write_config,
)

pytestmark = pytest.mark.broker
IN_CI = os.environ.get("CI", "").lower() in ("1", "true", "yes")

CELLAR = '[[item]]\nname = "{2}"\ntopic = "cellar/+/core"\nthreshold = 8.0\nambient = 20.0\n'


def test_fault01_a_long_topic_derived_name_is_a_dead_letter_not_a_poison_pill(
    broker, tmp_path, store_url
):
    """A name built from a 300-character topic level does not fit the store (PostgreSQL refused
    it and ingest stopped for good); it is set aside and the readings behind it are stored,
    also after a restart."""
    cfg = write_config(tmp_path, broker, db_url=store_url, items=CELLAR, refit_every=60)
    t0 = time.time() - 600
    with RunningDaemon(cfg) as d:
        publish(broker, [(f"cellar/{'x' * 300}/core", json.dumps({"ts": t0, "value": 4.0}))])
        publish(broker, readings("cellar/tank-1/core", t0, 50))
        wait_for(lambda: count_readings(store_url, "tank-1") == 50, 10, d.log)
        reasons = wait_for(lambda: dead_letter_reasons(store_url), 5, d.log)
        assert len(reasons) == 1 and "name" in reasons[0], reasons
    with RunningDaemon(cfg) as d:  # nothing is left unacknowledged to replay
        publish(broker, readings("cellar/tank-1/core", t0, 10, start=50))
        wait_for(lambda: count_readings(store_url, "tank-1") == 60, 10, d.log)
    assert len(dead_letter_reasons(store_url)) == 1


def test_fault01_topic_derived_names_keep_the_configured_characters(broker, tmp_path):
    """Only the characters a configured name may hold (letters, digits, . _ - :) pass."""
    url = f"sqlite:///{tmp_path / 'store.db'}"
    cfg = write_config(tmp_path, broker, db_url=url, items=CELLAR, refit_every=60)
    t0 = time.time() - 600
    with RunningDaemon(cfg) as d:
        publish(
            broker,
            [
                (f"cellar/{name}/core", json.dumps({"ts": t0, "value": 4.0}))
                for name in ("tank 2", "tank\u00a03", "tänk", "<b>", "a;b")
            ]
            + readings("cellar/tank-1/core", t0, 5),
        )
        wait_for(lambda: count_readings(url, "tank-1") == 5, 10, d.log)
        reasons = wait_for(
            lambda: len(dead_letter_reasons(url)) == 5 and dead_letter_reasons(url), 5
        )
    assert all("name" in r for r in reasons), reasons


def test_fault01_a_reading_the_store_refuses_does_not_block_its_batch(broker, tmp_path):
    """Injected: a SQLite trigger refuses one value.  The batch around it is stored row by row,
    the refused reading is a dead letter, and ingest goes on."""
    url = f"sqlite:///{tmp_path / 'store.db'}"
    cfg = write_config(tmp_path, broker, db_url=url, items=CELLAR, refit_every=60)
    t0 = time.time() - 600
    with RunningDaemon(cfg) as d:
        publish(broker, readings("cellar/tank-1/core", t0, 1))
        wait_for(lambda: count_readings(url, "tank-1") == 1, 10, d.log)
        eng = create_engine(url)
        with eng.begin() as conn:
            conn.execute(
                text(
                    "CREATE TRIGGER refuse BEFORE INSERT ON readings WHEN NEW.value_c = 13.13 "
                    "BEGIN SELECT RAISE(ABORT, 'refused by the test'); END"
                )
            )
        eng.dispose()
        batch = readings("cellar/tank-1/core", t0, 40, start=1)
        batch[20] = ("cellar/tank-1/core", json.dumps({"ts": t0 + 500, "value": 13.13}))
        publish(broker, batch)
        wait_for(lambda: count_readings(url, "tank-1") == 40, 10, d.log)
        reasons = wait_for(lambda: dead_letter_reasons(url), 5, d.log)
        assert len(reasons) == 1 and "refused" in reasons[0], reasons
        publish(broker, readings("cellar/tank-1/core", t0, 10, start=41))
        wait_for(lambda: count_readings(url, "tank-1") == 50, 10, d.log)


def _faketime(tmp_path):
    from thermeta.daemon.testing import faketime_env

    env = faketime_env(tmp_path / "clock-offset")
    if env is None:
        if IN_CI:
            pytest.fail("CI=true but libfaketime is not installed (apt-get install libfaketime)")
        pytest.skip("libfaketime not installed (apt-get install libfaketime)")
    return env


def _forecasts(url: str) -> list[tuple[str, str]]:
    eng = create_engine(url)
    try:
        with eng.connect() as conn:
            q = (
                "SELECT i.name, f.state FROM forecasts f JOIN items i ON i.id = f.item_id "
                "ORDER BY f.id"
            )
            return [tuple(r) for r in conn.execute(text(q))]
    finally:
        eng.dispose()


def _made(url: str) -> dict[str, tuple[float, str]]:
    """Each item's newest forecast: when it was made and its state (the refit overwrites it every
    round; the history keeps only forecasts that say something new)."""
    eng = create_engine(url)
    try:
        with eng.connect() as conn:
            q = (
                "SELECT i.name, c.made_at, c.state FROM current_forecasts c "
                "JOIN items i ON i.id = c.item_id"
            )
            return {r[0]: (r[1], r[2]) for r in conn.execute(text(q))}
    finally:
        eng.dispose()


def _rounds_after(url: str, n: int, timeout: float, log) -> dict[str, tuple[float, str]]:
    """Wait until every item's newest forecast has been made anew ``n`` times (refit rounds go
    on); returns the last seen."""

    def renewed(base: dict[str, tuple[float, str]]) -> dict[str, tuple[float, str]] | None:
        now = _made(url)
        return now if base and all(now[k][0] != base[k][0] for k in base) else None

    seen = _made(url)
    for _ in range(n):
        seen = wait_for(lambda b=seen: renewed(b), timeout, log)
    return seen


def _heartbeat(url: str) -> dict:
    eng = create_engine(url)
    try:
        with eng.connect() as conn:
            row = conn.execute(text("SELECT value FROM meta WHERE key = 'daemon'")).scalar()
            return json.loads(row) if row else {}
    finally:
        eng.dispose()


def test_fault02_a_backward_clock_step_stops_no_scheduled_work(broker, tmp_path):
    """The daemon's wall clock stepped back an hour (libfaketime): refits and the heartbeat go
    on at their pace (APScheduler alone waited the hour out)."""
    env = _faketime(tmp_path)
    url = f"sqlite:///{tmp_path / 'store.db'}"
    cfg = write_config(tmp_path, broker, db_url=url, items=CELLAR, refit_every=1)
    sensors = Sensors(broker, ["cellar/tank-1/core"], stamped=False, every_s=0.5)
    with RunningDaemon(cfg, env=env) as d:
        sensors.start()
        try:
            # start-up under libfaketime is slow on a loaded machine: a generous first wait
            wait_for(lambda: len(_forecasts(url)) >= 2, 60, d.log)
            (tmp_path / "clock-offset").write_text("-3600\n")
            time.sleep(1.5)
            beat = _heartbeat(url)["heartbeat_at"]
            _rounds_after(url, 2, 15, d.log)
            wait_for(lambda: _heartbeat(url)["heartbeat_at"] != beat, 12, d.log)
        finally:
            sensors.stop()
    assert "stepped back by 3600 s" in d.text()


def test_fault02_a_forward_clock_step_raises_no_stale(broker, tmp_path):
    """The daemon's wall clock stepped forward an hour while its sensors (true clocks) report
    every 0.5 s: no item is judged silent, since silence is measured by arrival."""
    env = _faketime(tmp_path)
    url = f"sqlite:///{tmp_path / 'store.db'}"
    items = CELLAR.replace("ambient = 20.0", "ambient = 20.0\nsilence = 60")
    cfg = write_config(tmp_path, broker, db_url=url, items=items, refit_every=1)
    topics = [f"cellar/tank-{i}/core" for i in range(3)]
    sensors = Sensors(broker, topics, stamped=True)
    with RunningDaemon(cfg, env=env) as d:
        sensors.start()
        try:
            wait_for(lambda: len({n for n, _ in _forecasts(url)}) == 3, 60, d.log)
            (tmp_path / "clock-offset").write_text("+3600\n")
            time.sleep(1.5)
            before = len(_forecasts(url))
            newest = _rounds_after(url, 2, 25, d.log)
        finally:
            sensors.stop()
    after = _forecasts(url)[before:]
    assert [s for _, s in after if s == "stale"] == [], after
    assert len(newest) == 3 and all(st != "stale" for _, st in newest.values()), newest
    assert "stepped forward by 3600 s" in d.text()
