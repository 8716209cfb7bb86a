"""The refit asks an item's levels of one window inside one shared block
(predictors.shared): each level's forecast equals the one a lone forecast() call makes with the
same arguments.  Curve: Newton's law of cooling, T = Ta + (T0 - Ta) e^(-k t), with seeded
scatter."""

from __future__ import annotations

import json
import tomllib

import numpy as np
from thermeta.daemon.clock import ManualClock
from thermeta.daemon.config import parse_config
from thermeta.daemon.ingest.writer import Activity
from thermeta.daemon.refit.rounds import Refitter
from thermeta.predictors import forecast
from thermeta.storage.store import Store

T0 = 1_800_000_000.0
ITEM = """[[item]]
name = "load"
topic = "k/load"
threshold = 8.0
side = "above"

[[item.level]]
name = "warn"
threshold = 6.0
side = "above"

[[item.level]]
name = "frozen"
threshold = 1.0
side = "below"
"""


def test_each_level_of_a_refit_equals_its_lone_forecast(tmp_path):
    """A load warming from 3 degC toward a 12 degC room (ambient fitted), two hours of
    one-minute readings, three levels (8 and 6 degC above, 1 degC below): the refit makes one
    forecast per level, and each equals, field for field, a forecast made alone."""
    text = f'[storage]\nurl = "sqlite:///{tmp_path / "s.db"}"\n[fit]\nrefit_every = 60\n{ITEM}'
    cfg = parse_config(tomllib.loads(text), "t.toml", text)
    (item,) = cfg.items
    store = Store(cfg.storage.url)
    store.create_all()
    x = np.arange(0.0, 7200.0, 60.0)
    y = (
        12.0
        + (3.0 - 12.0) * np.exp(-x / 14400.0)
        + np.random.default_rng(21).normal(0, 0.05, x.size)
    )
    iid = store.ensure_item(item.name, unit="C", topic=item.topic, now=T0)
    store.write_batch(
        [
            {"item_id": iid, "ts": T0 + a, "value_c": float(b), "flags": 0, "received_at": T0}
            for a, b in zip(x, y)
        ]
    )
    act = Activity()
    act.note(item.name, item, T0 + float(x[-1]))
    rf = Refitter(store, cfg, ManualClock(T0 + float(x[-1]) + 1), act)
    calls = []

    def recording(*args, **kwargs):
        fc = forecast(*args, **kwargs)
        calls.append((args, kwargs, fc))
        return fc

    rf._predict = recording
    rf.run_once()
    store.close()
    assert sorted(args[2] for args, _, _ in calls) == [1.0, 6.0, 8.0]
    for args, kwargs, fc in calls:
        alone = forecast(*args, **kwargs)
        assert json.dumps(fc.to_dict(), sort_keys=True, default=str) == json.dumps(
            alone.to_dict(), sort_keys=True, default=str
        )
    assert any(fc.eta_s is not None for _, _, fc in calls)
