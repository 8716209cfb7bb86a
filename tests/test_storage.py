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
