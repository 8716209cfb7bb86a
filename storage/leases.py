"""Leases for several daemons sharing one PostgreSQL store (``daemon/cluster/``).

    leases           one row per item: which daemon (``holder``) refits it and raises its alerts
                     until ``expires_at`` (epoch seconds on the DATABASE's clock), and the
                     ``term``, counted up each time the item changes hands
    cluster_members  one row per daemon of a group: alive until ``expires_at``; the live count
                     sets each daemon's fair share of the items
    cluster_refits   the round log: which daemon refitted which item when (and in which term),
                     so that "never two daemons in one round" can be checked afterwards

Why a lease table and not advisory locks: a session's advisory lock lives exactly as long as its
connection, which is right after kill -9 (the kernel closes the socket) but wrong when the
network between a daemon and the database breaks: the server keeps the lock until TCP gives up
(minutes to hours), while the daemon, having lost its connection, cannot know whether it still
holds it.  A row with an expiry is one rule for every failure: the holder renews it every tick;
whoever stops renewing (killed, paused, cut off) loses it ``lease_s`` later, and the holder
itself stops using an item before then by its own monotonic clock (it started counting before
the renewal reached the database, so its deadline falls before the database's).  Every time
here is the database's clock (``clock_timestamp()``), never a daemon's, so daemons on hosts whose
clocks disagree still agree on who holds what.

All statements are short transactions; the claim uses ``FOR UPDATE SKIP LOCKED`` so two daemons
claiming at once take different items instead of waiting on each other.
"""

from __future__ import annotations

import json
import math
from collections.abc import Iterable
from dataclasses import dataclass, field
from typing import Any

from sqlalchemy import (
    BigInteger,
    Column,
    Double,
    Index,
    String,
    Table,
    Text,
    and_,
    delete,
    func,
    insert,
    literal_column,
    select,
    text,
    update,
)
from sqlalchemy.dialects import postgresql
from thermeta.storage.schema import _Id, current_forecasts, items, metadata, readings
from thermeta.storage.store import Store

leases = Table(
    "leases",
    metadata,
    Column("item", String(200), primary_key=True),
    Column("holder", String(200)),
    Column("expires_at", Double, nullable=False, default=0.0),
    Column("term", BigInteger, nullable=False, default=0),
    Index("ix_leases_holder", "holder"),
)

cluster_members = Table(
    "cluster_members",
    metadata,
    Column("instance", String(200), primary_key=True),
    Column("grp", String(200), nullable=False),
    Column("expires_at", Double, nullable=False),
    Column("body", Text, nullable=False),  # JSON: pid, host, items held, last round
)

cluster_refits = Table(
    "cluster_refits",
    metadata,
    Column("id", _Id, primary_key=True, autoincrement=True),
    Column("item", String(200), nullable=False),
    Column("instance", String(200), nullable=False),
    Column("term", BigInteger, nullable=False),
    Column("at", Double, nullable=False),  # the refit round's time (epoch s): made_at
    Column("done_at", Double, nullable=False),  # when the forecast was out (published, stored)
    Index("ix_cluster_refits_at", "at"),
)

_NOW = literal_column("extract(epoch from clock_timestamp())", Double)


@dataclass
class Tick:
    """What one tick of :meth:`LeaseStore.tick` found: the items held now (name -> term), those
    gained and lost since the last tick, the live members and the database's time."""

    held: dict[str, int] = field(default_factory=dict)
    gained: list[str] = field(default_factory=list)
    lost: list[str] = field(default_factory=list)
    members: int = 1
    items: int = 0
    db_now: float = 0.0
    mine: int = 0  # rows naming us as holder at the tick's start (for the log)


class LeaseStore:
    """The lease queries of one daemon (``instance``) of ``group`` over a PostgreSQL store."""

    def __init__(self, store: Store, group: str, instance: str, lease_s: float):
        if store.dialect != "postgresql":
            raise ValueError(f"leases need a PostgreSQL store, not {store.dialect}")
        if not lease_s > 0:
            raise ValueError(f"lease_s must be > 0, got {lease_s!r}")
        self.store = store
        self.group = group
        self.instance = instance
        self.lease_s = float(lease_s)

    def tick(
        self,
        held_before: Iterable[str] | None,
        *,
        claim: bool = True,
        body: dict[str, Any] | None = None,
        slack: int = 1,
    ) -> Tick:
        """One transaction: say we are alive, list new items, renew our leases, and claim
        expired ones up to our fair share (``ceil(items / live members)``); beyond share +
        ``slack`` we stop renewing the excess (it expires and another daemon takes it)."""
        before = None if held_before is None else set(held_before)
        L = self.lease_s
        # every expiry is set and compared on the database's clock AT THE STATEMENT (a tick that
        # waited on a lock must not hand out a lease already run out)
        now = _NOW
        out = Tick()
        with self.store.transaction() as conn:
            member = {
                "instance": self.instance,
                "grp": self.group,
                "expires_at": now + L,
                "body": json.dumps(body or {}),
            }
            up = postgresql.insert(cluster_members).values(**member)
            conn.execute(
                up.on_conflict_do_update(
                    index_elements=["instance"],
                    set_={k: up.excluded[k] for k in ("grp", "expires_at", "body")},
                )
            )
            unknown = select(leases.c.item).where(leases.c.item == items.c.name).exists()
            conn.execute(
                postgresql.insert(leases)
                .from_select(
                    ["item", "expires_at", "term"],
                    select(items.c.name, text("0.0"), text("0")).where(
                        items.c.kind == "load", ~unknown
                    ),
                )
                .on_conflict_do_nothing()
            )
            out.items = int(conn.execute(select(func.count()).select_from(leases)).scalar_one())
            out.members = max(
                1,
                int(
                    conn.execute(
                        select(func.count())
                        .select_from(cluster_members)
                        .where(cluster_members.c.grp == self.group)
                        .where(cluster_members.c.expires_at > now)
                    ).scalar_one()
                ),
            )
            share = math.ceil(out.items / out.members)
            mine = dict(
                conn.execute(
                    select(leases.c.item, leases.c.term)
                    .where(leases.c.holder == self.instance)
                    .order_by(leases.c.item)
                ).all()
            )
            # Ours in the table but given up at an earlier tick are let run out; at the first
            # tick (held_before None) whatever is still ours is taken up again.
            out.mine = len(mine)
            keep = list(mine) if before is None else [n for n in mine if n in before]
            keep = keep[: share + slack]
            held: dict[str, int] = {}
            if keep:
                renewed = conn.execute(
                    update(leases)
                    .where(leases.c.holder == self.instance, leases.c.item.in_(keep))
                    .values(expires_at=now + L)
                    .returning(leases.c.item, leases.c.term)
                ).all()
                held = {str(n): int(t) for n, t in renewed}
            if claim:
                # up to our share; beyond it only items nobody has taken for a whole lease
                want = share - len(held)
                for cond, limit in (
                    (leases.c.expires_at < now, want),
                    (and_(leases.c.holder.is_not(None), leases.c.expires_at < now - L), None),
                ):
                    if limit is not None and limit <= 0:
                        continue
                    free = select(leases.c.item).where(cond).order_by(leases.c.item)
                    if limit is not None:
                        free = free.limit(limit)
                    got = conn.execute(
                        update(leases)
                        .where(
                            leases.c.item.in_(
                                free.with_for_update(skip_locked=True).scalar_subquery()
                            )
                        )
                        .values(holder=self.instance, expires_at=now + L, term=leases.c.term + 1)
                        .returning(leases.c.item, leases.c.term)
                    ).all()
                    held.update({str(n): int(t) for n, t in got})
            out.db_now = float(conn.execute(select(_NOW)).scalar_one())
        out.held = held
        out.gained = sorted(set(held) - (before or set()))
        out.lost = sorted((before or set()) - set(held))
        return out

    def leave(self) -> None:
        """A clean stop: give up every lease and membership at once (others take over at their
        next tick instead of after the lease runs out)."""
        with self.store.transaction() as conn:
            now = float(conn.execute(select(_NOW)).scalar_one())
            conn.execute(
                update(leases)
                .where(leases.c.holder == self.instance)
                .values(expires_at=func.least(leases.c.expires_at, now))
            )
            conn.execute(delete(cluster_members).where(cluster_members.c.instance == self.instance))

    def create_tables(self) -> None:
        """``Store.create_all`` with the group's daemons taking turns (several starting at once
        would race on PostgreSQL's catalogue); the lock is the connection's, so it goes with it."""
        with self.store.reading() as conn:
            conn.execute(text("select pg_advisory_lock(hashtext('thermeta.create_all'))"))
            try:
                self.store.create_all()
            finally:
                conn.execute(text("select pg_advisory_unlock(hashtext('thermeta.create_all'))"))
                conn.commit()

    # -- what a new holder reads ----------------------------------------------------------------
    def taken_over(self, names: list[str]) -> dict[str, tuple[str | None, float | None, float]]:
        """For items just gained: (topic, newest reading ts, newest forecast's made_at) each."""
        newest = (
            select(func.max(readings.c.ts)).where(readings.c.item_id == items.c.id)
        ).scalar_subquery()
        made = (
            select(current_forecasts.c.made_at).where(current_forecasts.c.item_id == items.c.id)
        ).scalar_subquery()
        out: dict[str, tuple[str | None, float | None, float]] = {}
        for i in range(0, len(names), 500):
            q = select(items.c.name, items.c.topic, newest, made).where(
                items.c.name.in_(names[i : i + 500])
            )
            with self.store.reading() as conn:
                for name, topic, ts, m in conn.execute(q):
                    out[str(name)] = (
                        topic,
                        None if ts is None else float(ts),
                        -math.inf if m is None else float(m),
                    )
        return out

    def current_bodies(self, names: list[str]) -> dict[str, dict[str, Any]]:
        """Each item's newest forecast JSON (the previous holder's), by name."""
        q = (
            select(items.c.name, current_forecasts.c.body)
            .join(current_forecasts, current_forecasts.c.item_id == items.c.id)
            .where(items.c.name.in_(names))
        )
        with self.store.reading() as conn:
            return {str(n): json.loads(b) for n, b in conn.execute(q)}

    def newest_readings(self, names: list[str]) -> dict[str, float]:
        """Newest reading time of each named item (one seek along the readings' key each)."""
        newest = (
            select(func.max(readings.c.ts)).where(readings.c.item_id == items.c.id)
        ).scalar_subquery()
        out: dict[str, float] = {}
        for i in range(0, len(names), 1000):
            q = select(items.c.name, newest).where(items.c.name.in_(names[i : i + 1000]))
            with self.store.reading() as conn:
                out.update({str(n): float(ts) for n, ts in conn.execute(q) if ts is not None})
        return out

    # -- the round log ----------------------------------------------------------------------------
    def record_refits(self, rows: list[tuple[str, int, float, float]], keep_s: float) -> None:
        """Log (item, term, at, done_at) refits of ours; drop log rows (anyone's, a dead
        daemon's too) older than ``keep_s``."""
        with self.store.transaction() as conn:
            if rows:
                conn.execute(
                    insert(cluster_refits),
                    [
                        {"item": n, "instance": self.instance, "term": t, "at": at, "done_at": d}
                        for n, t, at, d in rows
                    ],
                )
            cutoff = float(conn.execute(select(_NOW)).scalar_one()) - keep_s
            conn.execute(delete(cluster_refits).where(cluster_refits.c.at < cutoff))


def refit_log(store: Store) -> list[tuple[str, str, int, float]]:
    """Every logged refit as (item, instance, term, at), by item then time."""
    q = select(
        cluster_refits.c.item, cluster_refits.c.instance, cluster_refits.c.term, cluster_refits.c.at
    ).order_by(cluster_refits.c.item, cluster_refits.c.at)
    with store.reading() as conn:
        return [(str(a), str(b), int(c), float(d)) for a, b, c, d in conn.execute(q)]


def holders(store: Store) -> dict[str, str | None]:
    """Each item's holder now (None: nobody yet)."""
    with store.reading() as conn:
        return {str(n): h for n, h in conn.execute(select(leases.c.item, leases.c.holder))}


def members(store: Store, group: str) -> list[dict[str, Any]]:
    """The group's members with their last status (``expires_at`` on the database's clock)."""
    q = select(cluster_members).where(cluster_members.c.grp == group)
    with store.reading() as conn:
        return [
            dict(json.loads(r.body), instance=r.instance, expires_at=r.expires_at)
            for r in conn.execute(q)
        ]
