"""The store's contract, run on SQLite and (when THERMETA_TEST_PG_URL is set) PostgreSQL."""

from __future__ import annotations

import threading
import uuid

import pytest
from sqlalchemy import create_engine, text
from thermeta.storage.store import DeadLetter, Store, safe_url


@pytest.fixture(params=["sqlite", "postgresql"])
def store(request, tmp_path):
    """A fresh store: a SQLite file, or a private schema in the test PostgreSQL database."""
    if request.param == "sqlite":
        s = Store(f"sqlite:///{tmp_path / 'store.db'}")
        s.create_all()
        yield s
        s.close()
        return
    url = request.getfixturevalue("pg_url")
    schema = f"h3_{uuid.uuid4().hex[:10]}"
    admin = create_engine(url)
    with admin.begin() as conn:
        conn.execute(text(f"CREATE SCHEMA {schema}"))
    sep = "&" if "?" in url else "?"
    s = Store(f"{url}{sep}options=-csearch_path%3D{schema}")
    s.create_all()
    yield s
    s.close()
    with admin.begin() as conn:
        conn.execute(text(f"DROP SCHEMA {schema} CASCADE"))
    admin.dispose()


def rows(item_id, ts_values, value=1.0):
    return [
        dict(item_id=item_id, ts=float(t), value_c=value + t / 1000, flags=0, received_at=float(t))
        for t in ts_values
    ]


def test_duplicates_are_absorbed_by_the_item_time_key(store):
    """Redelivered readings (same item and timestamp) are stored once; other items are separate."""
    a = store.ensure_item("a", now=1.0)
    b = store.ensure_item("b", now=1.0)
    store.write_batch(rows(a, range(1000, 1010)))
    store.write_batch(rows(a, range(1005, 1015)) + rows(b, range(1000, 1003)))
    got = store.recent_readings("a")
    assert [t for t, _ in got] == [float(t) for t in range(1000, 1015)]
    assert len(store.recent_readings("b")) == 3
    assert store.counts() == {"items": 2, "readings": 18, "dead_letters": 0}


def test_readings_since_and_ordering(store):
    """recent_readings returns oldest first from ``since_ts`` on, whatever the insert order."""
    a = store.ensure_item("probe", now=1.0)
    store.write_batch(rows(a, [1050, 1010, 1030, 1020]))
    assert [t for t, _ in store.recent_readings("probe", since_ts=1020)] == [1020.0, 1030.0, 1050.0]
    assert store.recent_readings("nobody") == []


def test_batch_with_dead_letters_is_one_transaction(store):
    """Readings and dead letters of a batch commit together and are counted."""
    a = store.ensure_item("a", now=1.0)
    store.write_batch(
        rows(a, [1, 2]),
        [
            DeadLetter(
                received_at=5.0, topic="t/x", item=None, reason="not UTF-8 text", payload="\\xff"
            )
        ]
        * 3,
    )
    assert store.counts()["dead_letters"] == 3
    assert store.recent_dead_letters(1)[0]["reason"] == "not UTF-8 text"


def test_forecast_history_and_latest(store):
    """Every forecast is kept as history; latest_forecasts gives the newest per item."""
    a = store.ensure_item("a", now=1.0)
    b = store.ensure_item("b", now=1.0)
    store.save_forecast(a, 10.0, "learning", {"eta_s": None, "state": "learning"}, 9.0)
    store.save_forecast(a, 20.0, "approaching", {"eta_s": 600.0, "state": "approaching"}, 19.0)
    store.save_forecast(b, 15.0, "steady", {"eta_s": None, "state": "steady"}, 14.0)
    latest = {f.item: f for f in store.latest_forecasts()}
    assert latest["a"].state == "approaching" and latest["a"].forecast["eta_s"] == 600.0
    assert latest["b"].made_at == 15.0
    assert [h.state for h in store.forecast_history("a")] == ["approaching", "learning"]
    assert {i["name"]: i["state"] for i in store.list_items()} == {
        "a": "approaching",
        "b": "steady",
    }


def test_retention_prunes_old_rows_but_keeps_each_items_newest_forecast(store):
    """prune() deletes readings, dead letters and forecast history older than the cut-off, except
    the newest forecast of each item (status must still show it)."""
    a = store.ensure_item("a", now=1.0)
    store.write_batch(
        rows(a, [100, 200, 300]),
        [DeadLetter(received_at=50.0, topic="t", item="a", reason="r", payload="p")],
    )
    store.save_forecast(a, 100.0, "steady", {"eta_s": None}, 100.0)
    store.save_forecast(a, 150.0, "steady", {"eta_s": None}, 150.0)
    gone = store.prune(250.0)
    assert gone == {"readings": 2, "forecasts": 1, "dead_letters": 1}
    assert [t for t, _ in store.recent_readings("a")] == [300.0]
    assert store.latest_forecasts()[0].made_at == 150.0


def test_meta_values_round_trip(store):
    """set_meta/get_meta keep JSON values; last_refit_at reads the daemon's stamp."""
    assert store.last_refit_at() is None
    store.set_meta("last_refit_at", 1234.5)
    store.set_meta("last_refit_at", 1240.0)
    assert store.last_refit_at() == 1240.0
    store.set_meta("stats", {"readings_per_s": 3.5})
    assert store.get_meta("stats") == {"readings_per_s": 3.5}


def test_concurrent_writer_and_reader(store):
    """A reader (the status command) works while a writer commits batches."""
    a = store.ensure_item("a", now=1.0)
    errors = []

    def write():
        try:
            for i in range(20):
                store.write_batch(rows(a, range(i * 50, i * 50 + 50)))
        except Exception as exc:  # noqa: BLE001 - collected and asserted on below
            errors.append(exc)

    th = threading.Thread(target=write)
    th.start()
    seen = []
    while th.is_alive():
        seen.append(store.counts()["readings"])
    th.join()
    assert not errors
    assert store.counts()["readings"] == 1000
    assert seen == sorted(seen)


def test_sqlite_runs_wal_and_full_sync(tmp_path):
    """SQLite is opened in WAL mode with synchronous=FULL (2), matching acks after commit."""
    s = Store(f"sqlite:///{tmp_path / 'x.db'}")
    s.create_all()
    with s.engine.connect() as conn:
        assert conn.exec_driver_sql("PRAGMA journal_mode").scalar() == "wal"
        assert conn.exec_driver_sql("PRAGMA synchronous").scalar() == 2
    s.close()


def test_safe_url_hides_passwords():
    """URLs shown in logs never carry the password."""
    assert "pw" not in safe_url("postgresql+psycopg://u:pw@db.example.org/thermeta")


def test_readings_table_is_lean_and_reads_along_its_key(store):
    """The readings live in their (item_id, ts) key alone (SQLite: WITHOUT ROWID; no time index
    on either database); the dashboard's frame comes in one query and equals the per-item reads,
    the newest reading per item is found along the key."""
    assert store.readings_layout() == "lean"
    a = store.ensure_item("a", now=1.0)
    b = store.ensure_item("b", now=1.0)
    store.ensure_item("a.ambient", kind="ambient", now=1.0)
    store.write_batch(rows(a, [100, 200, 300]) + rows(b, [150, 250]))
    series = store.recent_series(since_ts=180.0)
    assert series == {
        "a": store.recent_readings("a", since_ts=180.0),
        "b": store.recent_readings("b", since_ts=180.0),
    }
    assert store.last_reading_times() == {"a": 300.0, "b": 250.0}


def body(state, eta=None, lo=None, hi=None, levels=()):
    return {
        "state": state,
        "ok": eta is not None,
        "eta_s": eta,
        "eta_lo_s": lo,
        "eta_hi_s": hi,
        "levels": [{"name": n, "state": s, "eta_s": e} for n, s, e in levels],
    }


def test_forecast_history_keeps_only_what_says_something_new(store):
    """Every refit overwrites the current forecast; the history keeps a forecast when a state
    changes, a crossing time moves by more than 2 min or 10 % of the time ahead, or an hour has
    passed since the newest kept one (storage/forecasts.py)."""
    a = store.ensure_item("a", now=1.0)
    t0 = 1000.0
    kept = []
    for i in range(90):  # a refit a minute; the crossing stays at t0 + 5400 within seconds
        m = t0 + 60.0 * i
        eta = t0 + 5400.0 + (i % 3) - m
        kept.append(store.save_forecasts([(a, m, "approaching", body("approaching", eta), m)]))
    assert sum(kept) == 2  # the first, and one an hour later
    assert [i for i, k in enumerate(kept) if k] == [0, 60]
    m = t0 + 90 * 60.0
    assert store.save_forecasts([(a, m, "approaching", body("approaching", 5400.0), m)]) == 1
    assert store.save_forecasts([(a, m + 60, "crossed", body("crossed", 5340.0), m)]) == 1
    level = [("warn", "approaching", 600.0)]
    assert store.save_forecasts([(a, m + 120, "crossed", body("crossed", 5280, levels=level), m)])
    now = store.latest_forecasts()[0]
    assert (now.made_at, now.state) == (m + 120, "crossed")
    history = store.forecast_history("a", limit=1000)
    assert len(history) == 5 and history[0].made_at == m + 120
    # the current forecast leads the history even when the history did not keep it
    store.save_forecasts([(a, m + 180, "crossed", body("crossed", 5220, levels=level), m)])
    assert [h.made_at for h in store.forecast_history("a", limit=2)] == [m + 180, m + 120]
    # a restarted service compares with what the store kept, not with nothing
    again = Store(store.url)
    row = (a, m + 240, "crossed", body("crossed", 5160, levels=level), m)
    assert again.save_forecasts([row]) == 0
    again.close()


def test_retention_goes_along_the_key_and_history_has_its_own(store):
    """prune() removes readings item by item (no time index), and forecast history by its own
    cut-off; the current forecast stays."""
    a = store.ensure_item("a", now=1.0)
    b = store.ensure_item("b.ambient", kind="ambient", now=1.0)
    store.write_batch(rows(a, [100, 200, 300]) + rows(b, [100, 300]))
    store.save_forecast(a, 100.0, "steady", body("steady"), 100.0)
    store.save_forecast(a, 200.0, "approaching", body("approaching", 900.0), 200.0)
    gone = store.prune(250.0, history_before_ts=150.0)
    assert gone == {"readings": 3, "forecasts": 1, "dead_letters": 0}
    assert [t for t, _ in store.recent_readings("a")] == [300.0]
    assert [t for t, _ in store.recent_readings("b.ambient")] == [300.0]
    assert store.latest_forecasts()[0].made_at == 200.0


OLD_READINGS = (
    "CREATE TABLE readings (item_id INTEGER NOT NULL REFERENCES items (id) ON DELETE CASCADE, "
    "ts FLOAT NOT NULL, value_c FLOAT NOT NULL, flags SMALLINT NOT NULL, "
    "received_at FLOAT NOT NULL, PRIMARY KEY (item_id, ts))"
)


def test_a_store_made_before_keeps_working_and_upgrades(tmp_path):
    """A store from before the lean layout (a rowid readings table with a time index, no
    current_forecasts) reads and writes as it is; create_all() makes each item's newest
    forecast current, and upgrade_readings() rebuilds the readings without losing one."""
    from thermeta.storage import schema

    url = f"sqlite:///{tmp_path / 'old.db'}"
    engine = create_engine(url)
    old = [
        t for t in schema.metadata.sorted_tables if t.name not in ("readings", "current_forecasts")
    ]
    schema.metadata.create_all(engine, tables=old)
    with engine.begin() as conn:
        conn.execute(text(OLD_READINGS))
        conn.execute(text("CREATE INDEX ix_readings_ts ON readings (ts)"))
    engine.dispose()
    store = Store(url)
    assert store.readings_layout() == "rowid"
    a = store.ensure_item("a", now=1.0)
    store.write_batch(rows(a, [100, 200, 300]))
    store.save_forecast(a, 100.0, "steady", body("steady"), 100.0)
    store.save_forecast(a, 160.0, "steady", body("steady"), 160.0)
    assert len(store.forecast_history("a")) == 2  # no current table: the history holds all
    assert store.latest_forecasts()[0].made_at == 160.0
    before = store.recent_readings("a")
    store.close()
    store = Store(url)
    store.create_all()
    assert store.latest_forecasts()[0].made_at == 160.0
    assert store.upgrade_readings() is True
    assert store.readings_layout() == "lean"
    assert store.upgrade_readings() is False
    assert store.recent_readings("a") == before
    store.write_batch(rows(a, [300, 400]))
    assert [t for t, _ in store.recent_readings("a")] == [100.0, 200.0, 300.0, 400.0]
    store.close()


def test_upgrade_store_command_rebuilds_an_old_store_once(tmp_path, capsys):
    """`thermeta upgrade-store` on a store of the old layout: the readings are rebuilt and all
    kept; a second run has nothing to do; a store whose heartbeat names a live service is
    refused with exit 1 and one line."""
    import socket
    import subprocess
    import sys

    from thermeta.daemon.cli import main
    from thermeta.storage import schema

    url = f"sqlite:///{tmp_path / 'old.db'}"
    engine = create_engine(url)
    old = [t for t in schema.metadata.sorted_tables if t.name != "readings"]
    schema.metadata.create_all(engine, tables=old)
    with engine.begin() as conn:
        conn.execute(text(OLD_READINGS))
    engine.dispose()
    store = Store(url)
    a = store.ensure_item("a", now=1.0)
    store.write_batch(rows(a, range(100, 2100, 100)))
    before = store.recent_readings("a")
    store.close()
    cfg = tmp_path / "site.toml"
    site = '[[item]]\nname = "a"\ntopic = "site/a"\nthreshold = 8.0\n'
    cfg.write_text(f'[storage]\nurl = "{url}"\n{site}')

    def upgrade() -> tuple[int, str, str]:
        code = main(["upgrade-store", "--config", str(cfg)])
        out = capsys.readouterr()
        return code, out.out, out.err

    code, out, err = upgrade()
    assert code == 0 and "rebuilt" in out, err
    code, out, err = upgrade()
    assert code == 0 and "nothing to do" in out, err
    store = Store(url)
    assert store.readings_layout() == "lean"
    assert store.recent_readings("a") == before
    service = subprocess.Popen([sys.executable, "-c", "import time; time.sleep(60)", "thermeta"])
    store.set_meta("daemon", {"state": "running", "pid": service.pid, "host": socket.gethostname()})
    store.close()
    try:
        code, out, err = upgrade()
    finally:
        service.kill()
        service.wait()
    assert code == 1 and "stop it first" in err and len(err.strip().splitlines()) == 1, err


def test_many_items_windows_in_one_read(store):
    """windows() gives each item's readings from its own start (None: all), oldest first, the
    same as one recent_readings() per item; an item without readings is absent."""
    a = store.ensure_item("a", now=1.0)
    b = store.ensure_item("b", now=1.0)
    c = store.ensure_item("c", now=1.0)
    store.write_batch(rows(a, [100, 200, 300]) + rows(b, [150, 250, 350]))
    got = store.windows([(a, 150.0), (b, None), (c, 0.0)])
    assert set(got) == {a, b}
    for iid, since in ((a, 150.0), (b, None)):
        t, v = got[iid]
        assert list(zip(t, v)) == store.recent_readings(iid, since_ts=since)


def test_a_batch_commits_once_and_undoes_a_failed_write_alone(store):
    """Inside Store.batch, each transaction() is a savepoint of one transaction: its writes are
    read back inside the batch but by no other connection until the batch commits; a write that
    fails is undone alone (and raises as before); after_commit callbacks run after the commit."""
    from sqlalchemy import insert
    from thermeta.storage.errors import StoreRefused
    from thermeta.storage.schema import items

    other = Store(store.url)
    after: list[str] = []
    with store.batch():
        store.set_meta("first", 1)
        iid = store.ensure_item("probe-a", now=1.0)
        with pytest.raises(StoreRefused), store.transaction() as conn:
            conn.execute(insert(items).values(id=iid, name="probe-b", kind="load", unit="C",
                                              created_at=1.0))  # fmt: skip
        store.set_meta("second", 2)
        store.after_commit(lambda: after.append("committed"))
        assert store.get_meta("first") == 1  # the batch reads its own writes
        assert other.get_meta("first") is None  # nobody else does before the commit
        assert after == []
    assert after == ["committed"]
    assert other.get_meta("first") == 1 and other.get_meta("second") == 2
    assert other.item_ids(["probe-a", "probe-b"]) == {"probe-a": iid}
    other.close()


def test_a_batch_rolled_back_writes_nothing_and_calls_its_undo(store):
    """A batch whose block raises writes none of its writes and calls the on_rollback
    callbacks (never the after_commit ones); outside a batch after_commit calls at once."""
    undone: list[int] = []
    after: list[int] = []
    with pytest.raises(RuntimeError), store.batch():
        store.set_meta("lost", 1)
        store.on_rollback(lambda: undone.append(1))
        store.after_commit(lambda: after.append(1))
        raise RuntimeError("boom")
    assert store.get_meta("lost") is None and undone == [1] and after == []
    store.after_commit(lambda: after.append(2))
    store.on_rollback(lambda: undone.append(2))  # nothing under way: never called
    assert after == [2] and undone == [1]
