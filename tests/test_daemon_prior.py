"""Priors in the daemon: an episode teaches its item class, the lesson is kept in a real SQLite
store file, and after a restart the next batch of the class gets a usable forecast within its
first minutes.  Truth: the closed form of Newton's law, T = Ta + (T0 - Ta) e^(-k t)."""

from __future__ import annotations

import math
import tomllib

import numpy as np
import pytest
from sqlalchemy import func, select
from thermeta.daemon.clock import ManualClock
from thermeta.daemon.config import parse_config
from thermeta.daemon.ingest.writer import Activity
from thermeta.daemon.refit.rounds import Refitter
from thermeta.storage.errors import ConfigError
from thermeta.storage.priors import PriorStore, priors
from thermeta.storage.store import Store

T0 = 1_800_000_000.0
K = 1 / (15 * 60)  # wort through a plate chiller, tau 15 min (common practice: well under 1 h)
COOLANT = 11.0
THR = 20.0

ITEMS = """
[[item]]
name = "tank-{n}"
topic = "cellar/tank-{n}/wort"
threshold = 20.0
side = "below"
window = 3600
{extra}
"""


def config(tmp_path, items: list[tuple[int, str]]):
    text = f'[storage]\nurl = "sqlite:///{tmp_path / "s.db"}"\n' + "".join(
        ITEMS.format(n=n, extra=extra) for n, extra in items
    )
    return parse_config(tomllib.loads(text), "t.toml", text)


def wort(seed: int, t_end: float, duration_s: float) -> tuple[np.ndarray, np.ndarray]:
    """Readings every 10 s of wort chilled from 95 degC, ending at t_end; noise 0.2 degC."""
    rng = np.random.default_rng(seed)
    x = np.arange(0.0, duration_s + 1e-9, 10.0)
    # Newton's law of cooling, closed form
    y = COOLANT + (95.0 - COOLANT) * np.exp(-K * x) + rng.normal(0, 0.2, x.size)
    return t_end - duration_s + x, y


def feed(store: Store, act: Activity, cfg, name: str, t: np.ndarray, y: np.ndarray) -> None:
    it = next(i for i in cfg.items if i.name == name)
    iid = store.ensure_item(name, unit="C", topic=it.topic, now=float(t[0]))
    store.write_batch(
        [
            {
                "item_id": iid,
                "ts": float(a),
                "value_c": float(b),
                "flags": 0,
                "received_at": float(a),
            }
            for a, b in zip(t, y)
        ]
    )
    act.note(name, it, float(t.max()))


def true_eta(duration_s: float) -> float:
    return math.log((95.0 - COOLANT) / (THR - COOLANT)) / K - duration_s


def test_a_prior_stored_after_one_episode_is_used_by_the_next(tmp_path):
    """Tank 1's chilling (30 min, well past the crossing) teaches class 'cellar-chillers' once;
    after a restart on the same store file, tank 2's forecast 2 minutes into its chilling uses
    that prior and is within 10 % of the truth, while tank 3 (no class: its own, empty prior) on
    the same readings is not."""
    cls = 'prior_class = "cellar-chillers"'
    cfg = config(tmp_path, [(1, cls), (2, cls), (3, "")])
    store = Store(cfg.storage.url)
    store.create_all()
    act = Activity()
    feed(store, act, cfg, "tank-1", *wort(1, T0, 1800.0))
    rf = Refitter(store, cfg, ManualClock(T0), act)
    rf.run_once()
    assert rf.lessons == 1
    rf.run_once(force=True)  # the same readings again: no second lesson
    assert rf.lessons == 1
    body = PriorStore(store).get("cellar-chillers")
    assert body is not None and body["n_episodes"] == 1
    assert math.exp(body["logk_mean"]) == pytest.approx(K, rel=0.05)
    assert body["ambient_mean_c"] == pytest.approx(COOLANT, abs=0.5)
    assert PriorStore(store).learned_until("tank-1") == pytest.approx(T0)
    store.close()

    # restart: a new store object and refitter on the same file
    t1 = T0 + 3 * 3600
    store = Store(cfg.storage.url)
    store.create_all()
    act = Activity()
    t, y = wort(2, t1, 120.0)
    feed(store, act, cfg, "tank-2", t, y)
    feed(store, act, cfg, "tank-3", t, y)
    got: dict[str, dict] = {}
    rf = Refitter(store, cfg, ManualClock(t1), act)
    rf.listeners.append(lambda u: got.update({u.item.name: u.body}))
    rf.run_once()
    eta = true_eta(120.0)
    two, three = got["tank-2"], got["tank-3"]
    assert two["prior_class"] == "cellar-chillers" and "prior_class" not in three
    assert any("prior learned from 1 past episode" in w for w in two["warnings"])
    assert abs(two["eta_s"] - eta) / eta < 0.10
    assert three["eta_s"] is None or abs(three["eta_s"] - eta) / eta > 0.10
    assert rf.lessons == 0  # two minutes of chilling do not pin k down: nothing learned yet
    with store.engine.connect() as conn:
        assert conn.execute(select(func.count()).select_from(priors)).scalar() == 1
    store.close()


def test_prior_class_is_validated(tmp_path):
    """prior_class must be a string of 1-200 characters; the problem names the key."""
    for bad in ("prior_class = 5", f'prior_class = "{"x" * 201}"', 'prior_class = "  "'):
        with pytest.raises(ConfigError) as info:
            config(tmp_path, [(1, bad)])
        assert any("prior_class" in p for p in info.value.problems)


def learn_twice(url: str, cls: str, item: str) -> None:
    """Two lessons of one class through PriorStore.learn: the update sees the stored body, the
    row and the item's mark are written together."""
    from thermeta.predictors.prior import Prior

    store = Store(url)
    store.create_all()
    ps = PriorStore(store)
    assert ps.get(cls) is None and ps.learned_until(item) is None
    seen = []

    def step(k):
        def update(body):
            seen.append(body)
            return (Prior.from_dict(body) if body else Prior()).updated(k, COOLANT).to_dict()

        return update

    ps.learn(cls, item, T0, T0, step(K))
    ps.learn(cls, item, T0 + 60, T0 + 60, step(2 * K))
    assert seen[0] is None and seen[1]["n_episodes"] == 1
    body = ps.get(cls)
    assert body["n_episodes"] == 2 and math.exp(body["logk_mean"]) == pytest.approx(
        math.sqrt(2) * K
    )
    assert ps.learned_until(item) == T0 + 60 and cls in ps.all()
    store.close()


def test_prior_store_on_sqlite(tmp_path):
    """PriorStore on a SQLite file (see learn_twice)."""
    learn_twice(f"sqlite:///{tmp_path / 'p.db'}", "cellar-chillers", "tank-1")


def test_prior_store_on_postgresql(pg_url):
    """PriorStore on PostgreSQL (THERMETA_TEST_PG_URL), unique names per run."""
    tag = f"{np.random.default_rng().integers(1 << 40):x}"
    learn_twice(pg_url, f"chillers-{tag}", f"tank-{tag}")
