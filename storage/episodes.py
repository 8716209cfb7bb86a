"""Episodes and level sides, joined to the shared :data:`thermeta.storage.schema.metadata`.

    episodes     one row per episode of an item (a batch, a trip, a tray run): its name, class,
                 when and by whom it was opened and closed, and its record (JSON: the stages'
                 deadlines and actual times, the time beyond each limit, the budget used, the
                 mean kinetic temperature), kept up to date by the refit
    level_sides  the side of each ``auto`` level, decided ONCE from the live value and never
                 changed by later (or backfilled) readings

At most one episode of an item is open (``closed_at`` null): opening one closes the one before.
"""

from __future__ import annotations

import json
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

from sqlalchemy import (
    Column,
    Connection,
    Double,
    Index,
    PrimaryKeyConstraint,
    String,
    Table,
    Text,
    and_,
    func,
    insert,
    select,
    update,
)
from thermeta.storage.schema import _Id, metadata
from thermeta.storage.store import Store

episodes = Table(
    "episodes",
    metadata,
    Column("id", _Id, primary_key=True, autoincrement=True),
    Column("item", String(200), nullable=False),
    Column("name", String(200)),
    Column("class", String(200)),
    Column("opened_at", Double, nullable=False),
    Column("opened_by", String(16), nullable=False),
    Column("closed_at", Double),
    Column("closed_by", String(16)),
    Column("record", Text, nullable=False, default="{}"),
    Index("ix_episodes_item_opened", "item", "opened_at"),
    Index("ix_episodes_closed", "closed_at"),
)

level_sides = Table(
    "level_sides",
    metadata,
    Column("item", String(200), nullable=False),
    Column("level", String(200), nullable=False),
    Column("side", String(8), nullable=False),
    Column("decided_at", Double, nullable=False),
    Column("value", Double),  # the live value it was judged from, degC
    PrimaryKeyConstraint("item", "level", name="pk_level_sides"),
)


@dataclass
class Episode:
    """One episode of an item."""

    id: int
    item: str
    name: str | None
    cls: str | None
    opened_at: float
    opened_by: str
    closed_at: float | None = None
    closed_by: str | None = None
    record: dict[str, Any] = field(default_factory=dict)

    @property
    def is_open(self) -> bool:
        return self.closed_at is None

    def to_json(self) -> dict[str, Any]:
        from thermeta.predictors.result import rfc3339

        return {
            "id": self.id,
            "batch": self.name,
            "class": self.cls,
            "started_at": rfc3339(self.opened_at),
            "started_by": self.opened_by,
            "ended_at": rfc3339(self.closed_at),
            "ended_by": self.closed_by,
        }


@dataclass(frozen=True)
class Mark:
    """A start or end told from outside (an MQTT message, ``thermeta start``/``end``)."""

    item: str
    at: float
    action: str  # "start" | "end"
    source: str
    name: str | None = None
    cls: str | None = None


def _episode(r: Any) -> Episode:
    m = r._mapping
    return Episode(
        int(m["id"]),
        m["item"],
        m["name"],
        m["class"],
        float(m["opened_at"]),
        m["opened_by"],
        None if m["closed_at"] is None else float(m["closed_at"]),
        m["closed_by"],
        json.loads(m["record"] or "{}"),
    )


def start_in(
    conn: Connection,
    item: str,
    at: float,
    source: str,
    name: str | None = None,
    cls: str | None = None,
    record: dict[str, Any] | None = None,
) -> int:
    """Open an episode of ``item`` at ``at`` (closing its open one, by "next"); its id."""
    conn.execute(
        update(episodes)
        .where(episodes.c.item == item, episodes.c.closed_at.is_(None))
        .values(closed_at=at, closed_by="next")
    )
    return int(
        conn.execute(
            insert(episodes)
            .values(
                item=item,
                name=name,
                **{"class": cls},
                opened_at=at,
                opened_by=source,
                record=json.dumps(record or {}),
            )
            .returning(episodes.c.id)
        ).scalar_one()
    )


def end_in(conn: Connection, item: str, at: float, source: str) -> int | None:
    """Close the open episode of ``item``; its id, or None when none was open."""
    open_id = conn.execute(
        select(episodes.c.id).where(episodes.c.item == item, episodes.c.closed_at.is_(None))
    ).scalar()
    if open_id is None:
        return None
    conn.execute(
        update(episodes).where(episodes.c.id == open_id).values(closed_at=at, closed_by=source)
    )
    return int(open_id)


def apply_marks(conn: Connection, marks: list[Mark]) -> None:
    """Starts and ends told from outside, in time order, inside the caller's transaction."""
    for m in sorted(marks, key=lambda m: m.at):
        if m.action == "start":
            start_in(conn, m.item, m.at, m.source, m.name, m.cls)
        else:
            end_in(conn, m.item, m.at, m.source)


class EpisodeStore:
    """The episode and side queries over a :class:`~thermeta.storage.store.Store`."""

    def __init__(self, store: Store):
        self.store = store

    def start(
        self,
        item: str,
        at: float,
        source: str,
        name: str | None = None,
        cls: str | None = None,
        record: dict[str, Any] | None = None,
    ) -> int:
        with self.store.transaction() as conn:
            return start_in(conn, item, at, source, name, cls, record)

    def end(self, item: str, at: float, source: str) -> int | None:
        with self.store.transaction() as conn:
            return end_in(conn, item, at, source)

    def save_record(self, episode_id: int, record: dict[str, Any]) -> None:
        with self.store.transaction() as conn:
            conn.execute(
                update(episodes)
                .where(episodes.c.id == episode_id)
                .values(record=json.dumps(record))
            )

    def open_episodes(self) -> dict[str, Episode]:
        """The open episode of each item that has one."""
        q = select(episodes).where(episodes.c.closed_at.is_(None))
        with self.store.reading() as conn:
            return {e.item: e for e in map(_episode, conn.execute(q))}

    def get(self, episode_id: int) -> Episode | None:
        with self.store.reading() as conn:
            r = conn.execute(select(episodes).where(episodes.c.id == episode_id)).first()
        return None if r is None else _episode(r)

    def of_item(
        self, item: str, since: float | None = None, until: float | None = None
    ) -> list[Episode]:
        """The item's episodes that overlap [since, until], oldest first."""
        q = select(episodes).where(episodes.c.item == item).order_by(episodes.c.opened_at)
        if until is not None:
            q = q.where(episodes.c.opened_at <= until)
        if since is not None:
            q = q.where((episodes.c.closed_at.is_(None)) | (episodes.c.closed_at >= since))
        with self.store.reading() as conn:
            return [_episode(r) for r in conn.execute(q)]

    def newest_of(self, items: Sequence[str]) -> dict[str, Episode]:
        """Each item's newest episode by its start, open or closed (``of_item(item)[-1]``), for
        those of ``items`` that have one: one query per 500 items."""
        names = list(dict.fromkeys(items))
        out: dict[str, Episode] = {}
        for i in range(0, len(names), 500):
            newest = (
                select(episodes.c.item, func.max(episodes.c.opened_at).label("at"))
                .where(episodes.c.item.in_(names[i : i + 500]))
                .group_by(episodes.c.item)
                .subquery()
            )
            q = (
                select(episodes)
                .join(
                    newest,
                    and_(episodes.c.item == newest.c.item, episodes.c.opened_at == newest.c.at),
                )
                .order_by(episodes.c.id)
            )
            with self.store.reading() as conn:
                out.update({e.item: e for e in map(_episode, conn.execute(q))})
        return out

    # -- sides ---------------------------------------------------------------------------------
    def sides(self, item: str) -> dict[str, str]:
        with self.store.reading() as conn:
            q = select(level_sides.c.level, level_sides.c.side).where(level_sides.c.item == item)
            return {lv: side for lv, side in conn.execute(q)}

    def sides_of(self, items: Sequence[str]) -> dict[str, dict[str, str]]:
        """:meth:`sides` of many items (every one of ``items`` in the answer): one query per
        500 items."""
        names = list(dict.fromkeys(items))
        out: dict[str, dict[str, str]] = {n: {} for n in names}
        for i in range(0, len(names), 500):
            q = select(level_sides.c.item, level_sides.c.level, level_sides.c.side).where(
                level_sides.c.item.in_(names[i : i + 500])
            )
            with self.store.reading() as conn:
                for item, lv, side in conn.execute(q):
                    out[item][lv] = side
        return out

    def decide_sides(
        self, rows: Sequence[tuple[str, str, str, float, float | None]]
    ) -> dict[tuple[str, str], str]:
        """:meth:`decide_side` of many (item, level, side, at, value) in one transaction (two
        statements per 500): the side recorded for each (item, level) afterwards."""
        out: dict[tuple[str, str], str] = {}
        ignore = self.store._insert_ignore(level_sides)
        if ignore is None:  # neither SQLite nor PostgreSQL: one by one
            for item, level, side, at, value in rows:
                out[(item, level)] = self.decide_side(item, level, side, at, value)
            return out
        for i in range(0, len(rows), 500):
            part = rows[i : i + 500]
            values = [
                {"item": it, "level": lv, "side": sd, "decided_at": at, "value": v}
                for it, lv, sd, at, v in part
            ]
            with self.store.transaction() as conn:
                conn.execute(ignore, values)
                q = select(level_sides.c.item, level_sides.c.level, level_sides.c.side).where(
                    level_sides.c.item.in_(list({r[0] for r in part}))
                )
                wanted = {(r[0], r[1]) for r in part}
                out.update({(it, lv): sd for it, lv, sd in conn.execute(q) if (it, lv) in wanted})
        return out

    def decide_side(self, item: str, level: str, side: str, at: float, value: float | None) -> str:
        """Record ``side`` for the level unless one is recorded already; the recorded one."""
        with self.store.transaction() as conn:
            found = conn.execute(
                select(level_sides.c.side).where(
                    level_sides.c.item == item, level_sides.c.level == level
                )
            ).scalar()
            if found is not None:
                return str(found)
            conn.execute(
                insert(level_sides).values(
                    item=item, level=level, side=side, decided_at=at, value=value
                )
            )
        return side
