"""Several daemons sharing one site: a real Mosquitto (MQTT 5 shared subscription), a real
PostgreSQL (THERMETA_TEST_PG_URL; leases, the shared outbox), three ``thermeta run`` processes
and a real HTTP receiver for the webhook.  One daemon is killed with SIGKILL mid-stream.

The readings are invented (``thermeta.daemon.cluster.scenario``: Newton's law of cooling, the
published law; a cluster test checks the plumbing, not the physics): every tenth probe warms past
its limit, so alerts are raised on every daemon, some by the daemon that took an item over.
"""

from __future__ import annotations

import json
import subprocess
import sys
import time
from collections import Counter, defaultdict
from concurrent.futures import ThreadPoolExecutor

import pytest
from sqlalchemy import create_engine, text
from test_hooks import Receiver
from thermeta.daemon.cli.status import _head_lines, instances
from thermeta.daemon.cluster.scenario import ITEMS, Stream
from thermeta.daemon.config import load_config
from thermeta.daemon.ingest.mqtt import read_retained
from thermeta.daemon.testing import RunningDaemon, wait_for, write_config
from thermeta.storage.errors import ConfigError
from thermeta.storage.store import Store, instance_beat_key

N_ITEMS = 1000
HISTORY = 12  # rounds of readings whose time stamps lie in the past, sent at once
REFIT_S = 12.0
HOOK = '[cluster]\ngroup = "yard"\n\n[[hook]]\nkind = "webhook"\nurl = "{url}"\n'


NODES = [f"thermeta-node-{k}" for k in range(3)]


def _running(store: Store) -> list[str]:
    """The group's daemons whose own heartbeat says they run now (what status lists)."""
    return [d["instance"] for d in instances(store, "yard", time.time()) if d["running"]]


def _q(url: str, sql: str) -> list:
    eng = create_engine(url)
    try:
        with eng.connect() as conn:
            return list(conn.execute(text(sql)))
    finally:
        eng.dispose()


@pytest.mark.postgres
def test_three_daemons_one_killed_lose_nothing_and_hand_over_within_two_rounds(
    broker, pg_schema_url, tmp_path
):
    """Three daemons, 1,000 items, one killed with SIGKILL mid-stream and started again after
    the hand-over: every reading stored exactly once, every item forecast again within two
    refit_every of the kill, every alert posted exactly once, and no item refitted by two
    daemons within one refit_every (the round log, checked against the lease terms); the
    daemon's retained status names its group and items held, and turns offline when it dies."""
    receiver = Receiver()
    store = Store(pg_schema_url)
    daemons, cfgs = [], []
    for k in range(3):
        work = tmp_path / f"d{k}"
        work.mkdir()
        cfg = write_config(
            work,
            broker,
            items=ITEMS,
            db_url=pg_schema_url,
            client_id=f"thermeta-node-{k}",
            refit_every=REFIT_S,
            protocol="5",
            extra=HOOK.format(url=receiver.url),
        )
        daemons.append(RunningDaemon(cfg))
        cfgs.append(load_config(cfg))
    try:
        for d in daemons:
            d.start(wait_connected=False)
        for d in daemons:
            wait_for(lambda d=d: "connected to " in d.text(), 20, d.log)
        stream = Stream(broker, N_ITEMS, HISTORY)
        stream.start()
        # every daemon holds items and every item has its first forecast before the kill (an
        # item's first refit is the dearest: its first lesson and alert memory are written)
        wait_for(
            lambda: (
                len(_q(pg_schema_url, "select distinct holder from leases")) == 3
                and _q(pg_schema_url, "select count(*) from current_forecasts")[0][0] == N_ITEMS
            ),
            120,
            daemons[0].log,
        )
        victim = daemons[2]

        def retained() -> dict:
            return read_retained(cfgs[2].broker, "thermeta/status/thermeta-node-2") or {}

        # each daemon's own retained status names its group, instance and items held, and each
        # writes its own heartbeat: all three are listed as running
        wait_for(lambda: retained().get("items_held", 0) > 0, 3 * REFIT_S, victim.log)
        status = retained()
        assert status["state"] == "online" and status["group"] == "yard"
        assert status["instance"] == "thermeta-node-2"
        wait_for(lambda: _running(store) == NODES, 20, victim.log)
        victim.kill9()
        killed_at = time.time()
        theirs = {
            r[0]
            for r in _q(pg_schema_url, "select item from leases where holder = 'thermeta-node-2'")
        }
        assert theirs, "the killed daemon held no items"

        def forecast_again() -> bool:
            rows = _q(
                pg_schema_url,
                "select count(distinct item) from cluster_refits "
                f"where done_at > {killed_at} "
                "and instance <> 'thermeta-node-2'",
            )
            return rows[0][0] == N_ITEMS

        deadline = time.monotonic() + 6 * REFIT_S
        while not forecast_again() and time.monotonic() < deadline:
            time.sleep(0.2)
        firsts = dict(
            _q(
                pg_schema_url,
                "select item, min(done_at) from cluster_refits "
                f"where done_at > {killed_at} group by item",
            )
        )
        late = sorted(at - killed_at for at in firsts.values())
        # the broker's last will: the dead daemon's status says so
        gone = read_retained(cfgs[2].broker, "thermeta/status/thermeta-node-2")
        assert gone and gone["state"] == "offline"
        assert len(firsts) == N_ITEMS and late[-1] <= 2 * REFIT_S, (
            len(firsts),
            late[:: max(1, len(late) // 10)],
            sorted(set(theirs) - set(firsts))[:10],
            _q(
                pg_schema_url,
                f"select item, instance, at - {killed_at}, done_at - {killed_at} "
                "from cluster_refits order by done_at desc limit 5",
            ),
            [(i, i in theirs) for i, at in firsts.items() if at - killed_at > 2 * REFIT_S][:10],
        )
        stream.stop.set()
        stream.join(60)
        # its heartbeat stops: the other two are listed as running, the killed one is not
        wait_for(lambda: _running(store) == NODES[:2], 30, daemons[0].log)
        assert [d["instance"] for d in instances(store, "yard", time.time())] == NODES
        restarted_at = time.time()
        victim.start()  # its broker session holds the share of readings sent to it meanwhile
        want = N_ITEMS * stream.rounds
        wait_for(
            lambda: _q(pg_schema_url, "select count(*) from readings")[0][0] >= want,
            60,
            victim.log,
        )
        wait_for(
            lambda: (
                _q(pg_schema_url, "select count(*) from outbox where status = 'pending'")[0][0] == 0
            ),
            30,
            daemons[0].log,
        )
        # the restarted daemon is back in the group: it holds items again and refits them
        wait_for(
            lambda: (
                _q(
                    pg_schema_url,
                    "select count(*) from cluster_refits "
                    f"where instance = 'thermeta-node-2' and done_at > {restarted_at}",
                )[0][0]
                > 0
            ),
            3 * REFIT_S,
            victim.log,
        )
        shown = subprocess.run(
            [sys.executable, "-m", "thermeta.daemon.cli", "status"]
            + ["--config", str(daemons[0].config), "--json"],
            capture_output=True,
            text=True,
            timeout=120,
        )
        assert shown.returncode == 0, shown.stderr
        listed = json.loads(shown.stdout)["cluster"]
        assert listed["group"] == "yard"
        assert [(d["instance"], d["running"]) for d in listed["instances"]] == [
            (n, True) for n in NODES
        ]
        assert len({d["pid"] for d in listed["instances"]}) == 3
    finally:
        with ThreadPoolExecutor(len(daemons)) as pool:  # each stops on its own, at once
            list(pool.map(lambda d: d.stop(), daemons))
        receiver.close()
        store.close()

    # every reading exactly once
    n, distinct = _q(pg_schema_url, "select count(*), count(distinct (item_id, ts)) from readings")[
        0
    ]
    assert n == distinct == N_ITEMS * stream.rounds
    assert _q(pg_schema_url, "select count(*) from dead_letters")[0][0] == 0

    # every alert raised was posted, and posted once
    posted = Counter(json.loads(b)["id"] for _, _, b in receiver.posts)
    raised = {r[0] for r in _q(pg_schema_url, "select key from alert_events")}
    assert len(raised) >= N_ITEMS // 10  # every warming item raised at least one
    assert set(posted) == raised
    assert max(posted.values()) == 1, [k for k, v in posted.items() if v > 1][:5]
    # no warning raised twice for one item's incident (a take-over repeats nothing)
    events = Counter(
        (r[0], r[1], r[2])
        for r in _q(pg_schema_url, "select item, episode, level from alert_events")
    )
    assert max(events.values()) == 1

    # never two daemons in one round: an item's refits by different daemons are at least
    # refit_every apart, and each lease term belongs to one daemon
    log = _q(pg_schema_url, "select item, instance, term, at from cluster_refits order by item, at")
    by_item = defaultdict(list)
    for item, inst, term, at in log:
        by_item[item].append((at, inst, term))
    holders_of_term = defaultdict(set)
    gaps = []
    for item, rows in by_item.items():
        for (a0, i0, _), (a1, i1, _) in zip(rows, rows[1:]):
            if i0 != i1:
                gaps.append(a1 - a0)
        for _, inst, term in rows:
            holders_of_term[(item, term)].add(inst)
    assert gaps, "no item changed hands"
    assert min(gaps) >= REFIT_S - 0.01, sorted(gaps)[:5]
    assert all(len(h) == 1 for h in holders_of_term.values())


def test_cluster_needs_a_postgresql_store(tmp_path):
    """[cluster] with a SQLite store is one line naming the file, the line and the key."""
    path = tmp_path / "thermeta.toml"
    path.write_text(
        '[storage]\nurl = "sqlite:///x.db"\n\n[cluster]\ngroup = "yard"\n\n'
        '[[item]]\nname = "a"\ntopic = "x/a"\nthreshold = 5\n'
    )
    with pytest.raises(ConfigError) as err:
        load_config(path)
    assert str(err.value).strip() == (
        f"{path}:5: cluster.group: needs a PostgreSQL store: [storage] url is sqlite "
        "(e.g. postgresql+psycopg://user@host/db)"
    )


def test_status_lists_each_daemon_of_a_group_by_its_own_heartbeat(tmp_path):
    """Each daemon of a group beats under its own key: ``thermeta status`` lists those running
    now by instance (another group's and a lone daemon's beats are not theirs), and names the
    ones whose heartbeat stopped."""
    store = Store(f"sqlite:///{tmp_path / 's.db'}")
    store.create_all()
    now = time.time()

    def beat(instance: str, group: str, age_s: float, pid: int) -> None:
        body = {"state": "running", "pid": pid, "host": "h", "heartbeat_at": now - age_s}
        body.update(group=group, instance=instance, connected=True, readings_per_s=2.0)
        store.set_meta(instance_beat_key(instance), body)

    beat("north-1", "yard", 3.0, 11)
    beat("north-2", "yard", 60.0, 12)  # stopped beating a minute ago
    beat("north-0", "yard", 1.0, 10)
    beat("south-1", "dock", 1.0, 21)  # another group's
    store.set_meta("daemon", {"state": "running", "pid": 10, "heartbeat_at": now - 1.0})
    got = instances(store, "yard", now)
    store.close()
    assert [(d["instance"], d["running"], d["pid"]) for d in got] == [
        ("north-0", True, 10),
        ("north-1", True, 11),
        ("north-2", False, 12),
    ]
    lines = _head_lines({"cluster": {"group": "yard", "instances": got}}, now)
    assert lines[0] == "cluster yard: 2 daemon(s) running"
    assert lines[1].startswith("  north-0: pid 10 on h, broker connected, 2.0 readings/s")
    assert lines[2].startswith("  north-1: pid 11")
    assert lines[3].startswith("  not running: north-2 (last heartbeat ")
