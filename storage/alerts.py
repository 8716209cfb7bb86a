"""Alert tables and their queries, joined to the shared :data:`thermeta.storage.schema.metadata`.

    alert_state   one row per item: the rule engine's memory (level, episode, last reminder ...),
                  so a restart neither repeats an alert nor forgets an open episode
    alert_events  every alert raised, with its one-sentence message and full JSON body
    outbox        one row per (alert, hook): pending until the hook took it, with attempts,
                  the next try and the last error; delivered rows are never sent again
    alert_acks    ``thermeta ack``: who acknowledged which item's incident, and when

(The columns ``level`` and ``episode`` of ``alert_events`` and ``alert_acks`` hold an alert's
event and incident number: their names are those of stores made by earlier versions.)

A raised alert, its outbox rows and the new rule state are written in ONE transaction: either the
alert exists and every hook will get it, or nothing happened and the next refit decides again.
"""

from __future__ import annotations

import json
import time
from collections.abc import Callable
from dataclasses import dataclass
from enum import StrEnum
from typing import Any

from sqlalchemy import (
    Column,
    Double,
    Index,
    Integer,
    String,
    Table,
    Text,
    UniqueConstraint,
    func,
    insert,
    select,
    update,
)
from thermeta.storage.schema import _Id, metadata
from thermeta.storage.store import Store


class OutboxStatus(StrEnum):
    """Where an outbox row stands."""

    PENDING = "pending"  # not yet taken by its hook
    DELIVERED = "delivered"
    FAILED = "failed"  # given up (too old)


@dataclass(frozen=True)
class OutboxRow:
    """A pending delivery: the row's id, the tries so far, when it was queued and the alert."""

    id: int
    attempts: int
    created_at: float
    alert: dict[str, Any]


alert_state = Table(
    "alert_state",
    metadata,
    Column("item", String(200), primary_key=True),
    Column("updated_at", Double, nullable=False),
    Column("body", Text, nullable=False),  # JSON of the rule engine's ItemAlertState
)

alert_events = Table(
    "alert_events",
    metadata,
    Column("id", _Id, primary_key=True, autoincrement=True),
    Column("key", String(300), nullable=False, unique=True),  # item:episode:level:seq
    Column("item", String(200), nullable=False),
    Column("level", String(32), nullable=False),
    Column("episode", Integer, nullable=False),
    Column("made_at", Double, nullable=False),
    Column("sentence", Text, nullable=False),
    Column("body", Text, nullable=False),
    Index("ix_alert_events_item_made", "item", "made_at"),
)

outbox = Table(
    "outbox",
    metadata,
    Column("id", _Id, primary_key=True, autoincrement=True),
    Column("event_id", Integer, nullable=False),
    Column("hook", String(200), nullable=False),
    Column("status", String(16), nullable=False, default=OutboxStatus.PENDING),
    Column("attempts", Integer, nullable=False, default=0),
    Column("created_at", Double, nullable=False),
    Column("next_at", Double, nullable=False),
    Column("done_at", Double),
    Column("last_error", String(500)),
    UniqueConstraint("event_id", "hook", name="uq_outbox_event_hook"),
    Index("ix_outbox_hook_status_next", "hook", "status", "next_at"),
)

alert_acks = Table(
    "alert_acks",
    metadata,
    Column("id", _Id, primary_key=True, autoincrement=True),
    Column("item", String(200), nullable=False),
    Column("episode", Integer, nullable=False),
    Column("acked_at", Double, nullable=False),
    Column("by", String(200)),
    Column("note", String(500)),
    Index("ix_alert_acks_item_episode", "item", "episode"),
)


class AlertStore:
    """The alert queries over a :class:`thermeta.storage.store.Store` (same engine, same locks)."""

    def __init__(self, store: Store):
        self.store = store

    # -- rule state ---------------------------------------------------------------------------
    def load_states(self) -> dict[str, dict[str, Any]]:
        with self.store.reading() as conn:
            return {r.item: json.loads(r.body) for r in conn.execute(select(alert_state))}

    def get_state(self, item: str) -> dict[str, Any] | None:
        with self.store.reading() as conn:
            text = conn.execute(
                select(alert_state.c.body).where(alert_state.c.item == item)
            ).scalar()
        return None if text is None else json.loads(text)

    def commit_step(
        self,
        item: str,
        state: dict[str, Any],
        alerts: list[dict[str, Any]],
        hooks_for: Callable[[dict[str, Any]], list[str]],
        now: float,
    ) -> list[int]:
        """Save ``state`` and insert ``alerts`` with one outbox row per hook, in one transaction.

        ``hooks_for(alert) -> list[str]`` names the hooks that want each alert.  Returns the ids
        of the new outbox rows.
        """
        new_rows: list[int] = []
        with self.store.transaction() as conn:
            text = json.dumps(state)
            done = conn.execute(
                update(alert_state)
                .where(alert_state.c.item == item)
                .values(body=text, updated_at=now)
            ).rowcount
            if not done:
                conn.execute(insert(alert_state).values(item=item, body=text, updated_at=now))
            for a in alerts:
                exists = conn.execute(
                    select(alert_events.c.id).where(alert_events.c.key == a["id"])
                ).scalar()
                if exists is not None:  # the same alert raised again after a crash: once only
                    continue
                event_id = conn.execute(
                    insert(alert_events)
                    .values(
                        key=a["id"],
                        item=a["item"],
                        level=a["event"],
                        episode=a["incident"],
                        made_at=now,
                        sentence=a["sentence"],
                        body=json.dumps(a),
                    )
                    .returning(alert_events.c.id)
                ).scalar_one()
                for hook in hooks_for(a):
                    rid = conn.execute(
                        insert(outbox)
                        .values(
                            event_id=event_id,
                            hook=hook,
                            status=OutboxStatus.PENDING,
                            attempts=0,
                            created_at=now,
                            next_at=now,
                        )
                        .returning(outbox.c.id)
                    ).scalar_one()
                    new_rows.append(int(rid))
        return new_rows

    # -- outbox -------------------------------------------------------------------------------
    def due(self, hook: str, now: float | None = None, limit: int = 20) -> list[OutboxRow]:
        """Pending rows of ``hook`` (whose next try is due by ``now`` if given), oldest first."""
        q = (
            select(outbox.c.id, outbox.c.attempts, outbox.c.created_at, alert_events.c.body)
            .join(alert_events, alert_events.c.id == outbox.c.event_id)
            .where(outbox.c.hook == hook, outbox.c.status == OutboxStatus.PENDING)
            .order_by(outbox.c.id)
            .limit(limit)
        )
        if now is not None:
            q = q.where(outbox.c.next_at <= now)
        with self.store.reading() as conn:
            return [
                OutboxRow(int(r.id), int(r.attempts), float(r.created_at), json.loads(r.body))
                for r in conn.execute(q)
            ]

    def claim(self, hook: str, now: float, hold_s: float) -> OutboxRow | None:
        """Several daemons sharing the outbox ([cluster]): take the oldest due row of ``hook``
        that no other daemon is taking (``FOR UPDATE SKIP LOCKED``) and put its next try
        ``hold_s`` ahead, so nobody else sends it while we do; a daemon that dies sending it
        leaves it to the others once ``hold_s`` has passed."""
        pick = (
            select(outbox.c.id)
            .where(
                outbox.c.hook == hook,
                outbox.c.status == OutboxStatus.PENDING,
                outbox.c.next_at <= now,
            )
            .order_by(outbox.c.id)
            .limit(1)
            .with_for_update(skip_locked=True)
        )
        with self.store.transaction() as conn:
            row_id = conn.execute(pick).scalar()
            if row_id is None:
                return None
            conn.execute(update(outbox).where(outbox.c.id == row_id).values(next_at=now + hold_s))
            r = conn.execute(
                select(outbox.c.id, outbox.c.attempts, outbox.c.created_at, alert_events.c.body)
                .join(alert_events, alert_events.c.id == outbox.c.event_id)
                .where(outbox.c.id == row_id)
            ).one()
        return OutboxRow(int(r.id), int(r.attempts), float(r.created_at), json.loads(r.body))

    def mark_delivered(self, row_id: int, now: float) -> None:
        with self.store.transaction() as conn:
            conn.execute(
                update(outbox)
                .where(outbox.c.id == row_id)
                .values(
                    status=OutboxStatus.DELIVERED,
                    done_at=now,
                    attempts=outbox.c.attempts + 1,
                    last_error=None,
                )
            )

    def mark_failed_try(
        self,
        row_id: int,
        next_at: float,
        error: str,
        *,
        give_up: bool = False,
        now: float | None = None,
    ) -> None:
        values: dict[str, Any] = {
            "attempts": outbox.c.attempts + 1,
            "next_at": next_at,
            "last_error": error[:500],
        }
        if give_up:
            values.update(status=OutboxStatus.FAILED, done_at=time.time() if now is None else now)
        with self.store.transaction() as conn:
            conn.execute(update(outbox).where(outbox.c.id == row_id).values(**values))

    def outbox_counts(self) -> dict[str, int]:
        q = select(outbox.c.status, func.count()).group_by(outbox.c.status)
        with self.store.reading() as conn:
            out = {str(s): 0 for s in OutboxStatus}
            out.update({s: int(n) for s, n in conn.execute(q)})
            return out

    def outbox_rows(self) -> list[dict[str, Any]]:
        with self.store.reading() as conn:
            return [dict(r._mapping) for r in conn.execute(select(outbox).order_by(outbox.c.id))]

    def deliveries(self, event_ids: list[int]) -> dict[int, list[tuple[str, str]]]:
        """(hook, status) of each of the events' outbox rows, by event id."""
        out: dict[int, list[tuple[str, str]]] = {}
        for i in range(0, len(event_ids), 500):
            q = select(outbox.c.event_id, outbox.c.hook, outbox.c.status).where(
                outbox.c.event_id.in_(event_ids[i : i + 500])
            )
            with self.store.reading() as conn:
                for eid, hook, status in conn.execute(q):
                    out.setdefault(int(eid), []).append((str(hook), str(status)))
        return out

    # -- events and acks ----------------------------------------------------------------------
    def events(self, item: str | None = None, limit: int = 200) -> list[dict[str, Any]]:
        q = select(alert_events).order_by(alert_events.c.id.desc()).limit(limit)
        if item is not None:
            q = q.where(alert_events.c.item == item)
        with self.store.reading() as conn:
            rows = [dict(r._mapping) for r in conn.execute(q)]
        for r in rows:
            r["body"] = json.loads(r["body"])
        return rows[::-1]

    def add_ack(
        self, item: str, incident: int, now: float, by: str | None, note: str | None
    ) -> None:
        with self.store.transaction() as conn:
            conn.execute(
                insert(alert_acks).values(
                    item=item, episode=incident, acked_at=now, by=by, note=note
                )
            )

    def acks(self, item: str) -> list[dict[str, Any]]:
        """Every acknowledgement of the item, oldest first (``incident`` for the column)."""
        q = select(alert_acks).where(alert_acks.c.item == item).order_by(alert_acks.c.id)
        with self.store.reading() as conn:
            rows = [dict(r._mapping) for r in conn.execute(q)]
        for r in rows:
            r["incident"] = r.pop("episode")
        return rows

    def ack_of(self, item: str, incident: int) -> dict[str, Any] | None:
        q = (
            select(alert_acks)
            .where(alert_acks.c.item == item, alert_acks.c.episode == incident)
            .order_by(alert_acks.c.id)
            .limit(1)
        )
        with self.store.reading() as conn:
            r = conn.execute(q).first()
        return None if r is None else dict(r._mapping)
