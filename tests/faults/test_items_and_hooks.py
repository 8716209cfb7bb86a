"""Faults 3-8 of the injection campaign: one item or hook reaching into another's business.

Each test runs the real thing: `thermeta run` against a real Mosquitto and SQLite, hooks as real
processes and real HTTP servers."""

from __future__ import annotations

import json
import time

import pytest
from sqlalchemy import create_engine, text
from thermeta.daemon.testing import (
    RunningDaemon,
    count_readings,
    dead_letter_reasons,
    publish,
    readings,
    wait_for,
    write_config,
)


def _latest_body(url: str, item: str) -> dict | None:
    eng = create_engine(url)
    try:
        with eng.connect() as conn:
            row = conn.execute(
                text(
                    "SELECT f.body FROM forecasts f JOIN items i ON i.id = f.item_id "
                    "WHERE i.name = :n ORDER BY f.id DESC LIMIT 1"
                ),
                {"n": item},
            ).scalar()
            return json.loads(row) if row else None
    finally:
        eng.dispose()


@pytest.mark.broker
@pytest.mark.parametrize("suffix", [".defrost", ".ambient"])
def test_fault03_a_crafted_topic_cannot_feed_another_items_companion_series(
    broker, tmp_path, suffix
):
    """A reading on `cellar/tank-1.defrost/core` would have been stored as the series that tank-1
    reads as its defrost signal (and `.ambient` as its air): names from topics may not end in a
    companion's suffix, so it is a dead letter and tank-1 sees no defrost and no ambient."""
    url = f"sqlite:///{tmp_path / 'store.db'}"
    items = (
        '[[item]]\nname = "{2}"\ntopic = "cellar/+/core"\nthreshold = 8.0\n'
        'defrost_topic = "cellar/+/defrost"\nambient_topic = "cellar/+/air"\n'
    )
    cfg = write_config(tmp_path, broker, db_url=url, items=items, refit_every=1)
    t0 = time.time() - 600
    with RunningDaemon(cfg) as d:
        publish(
            broker,
            [(f"cellar/tank-1{suffix}/core", json.dumps({"ts": t0 + 590, "value": 1}))]
            + readings("cellar/tank-1/core", t0, 30, step_s=20),
        )
        wait_for(lambda: count_readings(url, "tank-1") == 30, 10, d.log)
        body = wait_for(lambda: _latest_body(url, "tank-1"), 10, d.log)
    assert count_readings(url, f"tank-1{suffix}") == 0
    reasons = dead_letter_reasons(url)
    assert len(reasons) == 1 and suffix in reasons[0], reasons
    assert body.get("defrost") is None
    assert body.get("ambient_mode") != "measured", body.get("ambient_mode")
