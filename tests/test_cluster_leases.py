"""The lease table and the shared outbox on a real PostgreSQL (THERMETA_TEST_PG_URL): fair
shares, take-over after expiry only, a clean leave handing over at once, and an outbox row taken
by one claimer at a time (``FOR UPDATE SKIP LOCKED``)."""

from __future__ import annotations

import time
from collections import Counter
from concurrent.futures import ThreadPoolExecutor

import pytest
from thermeta.storage.alerts import AlertStore
from thermeta.storage.leases import LeaseStore, holders
from thermeta.storage.store import Store

pytestmark = pytest.mark.postgres


@pytest.fixture
def store(pg_schema_url):
    s = Store(pg_schema_url)
    s.create_all()
    s.ensure_items([(f"i{k:02d}", "load", "C", None) for k in range(10)])
    yield s
    s.close()


def _round(daemons, held, claim=True):
    for d in daemons:
        t = d.tick(held.get(d.instance), claim=claim)
        held[d.instance] = list(t.held)
    return held


def test_fair_shares_and_take_over_only_after_expiry(store):
    """Three daemons share 10 items 4/4/2; one stops renewing: its items stay its own until its
    lease (0.6 s here) runs out, then the other two take them, each up to its new share, and
    every hand-over counts the item's term up."""
    a, b, c = (LeaseStore(store, "g", n, 0.6) for n in "ABC")
    held = _round([a, b, c], {}, claim=False)  # the first tick only says who is there
    held = _round([a, b, c], held)
    assert sorted(len(v) for v in held.values()) == [2, 4, 4]
    assert sorted(n for v in held.values() for n in v) == [f"i{k:02d}" for k in range(10)]
    theirs = set(held["C"])
    _round([a, b], held)
    assert {n for n, h in holders(store).items() if h == "C"} == theirs  # not run out yet
    for _ in range(5):  # A and B go on renewing while C's lease runs out
        time.sleep(0.2)
        held = _round([a, b], held)
    assert sorted(len(held[x]) for x in "AB") == [5, 5]
    terms = a.tick(held["A"]).held | b.tick(held["B"]).held
    assert all(terms[n] == 2 for n in theirs) and all(
        terms[n] == 1 for n in terms if n not in theirs
    )


def test_a_clean_leave_hands_over_at_once(store):
    """A daemon that stops cleanly gives its leases up: the other takes them at its next tick."""
    a, b = LeaseStore(store, "g", "A", 60.0), LeaseStore(store, "g", "B", 60.0)
    held = _round([a, b], {}, claim=False)
    held = _round([a, b], held)
    assert len(held["A"]) == len(held["B"]) == 5
    a.leave()
    assert len(b.tick(held["B"]).held) == 10


def test_leases_refuse_sqlite(tmp_path):
    """Leases need PostgreSQL's row locks and clock; a SQLite store is refused."""
    with pytest.raises(ValueError, match="PostgreSQL"):
        LeaseStore(Store(f"sqlite:///{tmp_path / 's.db'}"), "g", "A", 5.0)


def test_outbox_rows_are_claimed_by_one_daemon_each(store):
    """Four claimers drain 40 pending rows at once: every row is taken exactly once."""
    astore = AlertStore(store)
    now = time.time()
    for k in range(40):
        alert = {"id": f"i{k:02d}:1:crossed:1", "item": f"i{k:02d}", "event": "crossed"}
        alert.update(incident=1, sentence="s")
        astore.commit_step(f"i{k:02d}", {}, [alert], lambda a: ["hook-0"], now)

    def drain() -> list[int]:
        got = []
        while (row := astore.claim("hook-0", time.time(), 60.0)) is not None:
            got.append(row.id)
            astore.mark_delivered(row.id, time.time())
        return got

    with ThreadPoolExecutor(4) as pool:
        taken = [i for ids in pool.map(lambda _: drain(), range(4)) for i in ids]
    assert len(taken) == 40 and max(Counter(taken).values()) == 1
    assert astore.outbox_counts()["delivered"] == 40
