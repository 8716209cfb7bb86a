"""The first refit round after a start stores each chunk in one transaction: the forecasts, the
levels' sides decided, the prior lessons taught and the alert rules' states (one commit, one
fsync on SQLite, per chunk rather than per item), on a real SQLite file.  Truth: the closed form
of Newton's law, T = Ta + (T0 - Ta) e^(-k t), wort chilled toward 11 degC coolant."""

from __future__ import annotations

import math
import tomllib

import numpy as np
import pytest
from sqlalchemy import event, func, select
from thermeta.daemon.alerts.service import AlertService
from thermeta.daemon.clock import ManualClock
from thermeta.daemon.config import parse_config
from thermeta.daemon.ingest.writer import Activity
from thermeta.daemon.refit.episodes import EpisodeKeeper
from thermeta.daemon.refit.rounds import SAVE_EVERY, Refitter
from thermeta.storage.alerts import alert_state
from thermeta.storage.episodes import EpisodeStore, level_sides
from thermeta.storage.priors import prior_items
from thermeta.storage.store import Store

T0 = 1_800_000_000.0
K = 1 / (15 * 60)  # wort through a plate chiller, tau 15 min (common practice: well under 1 h)
COOLANT = 11.0
N_ITEMS = 60  # two chunks of SAVE_EVERY (50) and 10

ITEM = """
[[item]]
name = "tank-{n:02d}"
topic = "cellar/tank-{n:02d}/wort"
threshold = 20.0
window = 3600
"""


def _setup(tmp_path):
    text = f'[storage]\nurl = "sqlite:///{tmp_path / "s.db"}"\n[fit]\nworkers = 0\n' + "".join(
        ITEM.format(n=n) for n in range(N_ITEMS)
    )
    cfg = parse_config(tomllib.loads(text), "t.toml", text)
    store = Store(cfg.storage.url)
    store.create_all()
    rng = np.random.default_rng(5)
    x = np.arange(0.0, 3600.0 + 1e-9, 10.0)
    rows = []
    for it in cfg.items:
        iid = store.ensure_item(it.name, unit="C", topic=it.topic, now=T0)
        # Newton's law of cooling, closed form, 0.2 degC scatter
        y = COOLANT + (95.0 - COOLANT) * np.exp(-K * x) + rng.normal(0, 0.2, x.size)
        rows += [
            {"item_id": iid, "ts": T0 + a, "value_c": float(b), "flags": 0, "received_at": T0}
            for a, b in zip(x, y)
        ]
    store.write_batch(rows)
    return cfg, store, T0 + float(x[-1])


def _round(cfg, store, last: float):
    act = Activity()
    for it in cfg.items:
        act.note(it.name, it, last)
    rf = Refitter(store, cfg, ManualClock(last + 5.0), act)
    alerts = AlertService(cfg, store, rf.clock, attach_png=False)
    alerts.start()
    rf.judges.append(alerts.on_forecast)
    commits = []
    on_commit = lambda conn: commits.append(1)  # noqa: E731
    event.listen(store.engine, "commit", on_commit)
    try:
        done = rf.run_once()
    finally:
        event.remove(store.engine, "commit", on_commit)
        alerts.stop()
    return rf, done, len(commits)


def _count(store, table) -> int:
    with store.reading() as conn:
        return int(conn.execute(select(func.count()).select_from(table)).scalar_one())


def test_the_first_round_stores_a_chunk_in_one_transaction_and_a_restart_keeps_it(tmp_path):
    """60 tanks of wort, each with one auto-sided limit and its own prior class: the first
    round decides 60 sides, teaches lessons and writes the alert rules' states, yet commits once
    a chunk of 50 forecasts (plus the round's time), not once an item; everything is stored
    when the round returns.  A second refitter on the same store (a restart) reads the sides
    back instead of deciding them, and teaches nothing twice."""
    cfg, store, last = _setup(tmp_path)
    rf, done, commits = _round(cfg, store, last)
    assert len(done) == N_ITEMS
    chunks = math.ceil(N_ITEMS / SAVE_EVERY)
    assert commits <= chunks + 1, commits  # + the round's time (meta "last_refit_at")
    assert _count(store, level_sides) == N_ITEMS
    sides = EpisodeStore(store).sides_of([it.name for it in cfg.items])
    # the wort is at about 12.5 degC, below the 20 degC limit: it is crossed from below
    assert all(s == {"limit": "above"} for s in sides.values()), sides
    assert rf.lessons > N_ITEMS // 2  # a clean hour of chilling pins k down
    assert _count(store, prior_items) == rf.lessons
    states = _count(store, alert_state)
    assert states == N_ITEMS
    assert not rf.keeper.unrecorded and not rf.teacher.unstored

    again, done2, commits2 = _round(cfg, store, last)
    assert len(done2) == N_ITEMS and commits2 <= chunks + 1
    assert again.lessons == 0  # the marks were stored with the lessons
    assert not again.keeper.unrecorded
    assert _count(store, level_sides) == N_ITEMS and _count(store, alert_state) == states
    store.close()


def test_sides_decided_in_a_rolled_back_batch_are_stored_with_the_next(tmp_path):
    """A chunk's transaction that is rolled back (here: the block raises) keeps the sides it
    would have stored, and the next chunk's transaction stores them; nothing is decided
    twice."""
    cfg, store, last = _setup(tmp_path)
    keeper = EpisodeKeeper(store)
    it = cfg.items[0]
    from thermeta.daemon.levels.spec import levels_of

    levels = levels_of(it)
    assert keeper.sides(it.name, it, levels, 40.0, last) == {"limit": "below"}
    with pytest.raises(RuntimeError), store.batch():
        keeper.write_sides()
        assert EpisodeStore(store).sides(it.name) == {"limit": "below"}  # inside: seen
        raise RuntimeError("the commit failed")
    assert EpisodeStore(store).sides(it.name) == {}
    assert len(keeper.unrecorded) == 1
    # judged again, the side stays as decided (not re-derived from a later value)
    assert keeper.sides(it.name, it, levels, 10.0, last + 60) == {"limit": "below"}
    with store.batch():
        keeper.write_sides()
    assert EpisodeStore(store).sides(it.name) == {"limit": "below"}
    assert not keeper.unrecorded
    store.close()


def test_an_alert_whose_batch_is_rolled_back_is_raised_again(tmp_path):
    """The alert rules write their state (and any alert with its outbox rows) inside the chunk's
    transaction; when that is rolled back they read their state back, so the next forecast
    raises the alert again and it is stored once, not lost."""
    from test_alerts_rules import T0_EPOCH, THR, fc_at
    from test_outbox import write_config
    from thermeta.daemon.config import load_config
    from thermeta.daemon.refit.common import ForecastUpdate
    from thermeta.storage.alerts import AlertStore

    cfg = load_config(write_config(tmp_path, ""))
    item = cfg.items[0]
    store = Store(cfg.storage.url)
    store.create_all()
    clock = ManualClock(T0_EPOCH)
    svc = AlertService(cfg, store, clock, attach_png=False)
    svc.start()

    def at(t_s, value, state):
        clock.set(T0_EPOCH + t_s)
        svc.on_forecast(ForecastUpdate(item, state, fc_at(0, value=value, state=state), None))

    def events():
        return [(e["body"]["event"], e["body"]["reminder"]) for e in AlertStore(store).events()]

    try:
        at(0, THR - 2, "steady")
        with pytest.raises(RuntimeError), store.batch():
            at(60, THR + 1, "crossed")
            assert events() == [("crossed", False)]  # inside the batch: there
            raise RuntimeError("the commit failed")
        assert events() == []
        at(120, THR + 1, "crossed")
        assert events() == [("crossed", False)]
    finally:
        svc.stop()
        store.close()
