"""The readings' part of :class:`thermeta.storage.store.Store`: the ingest batch (readings, dead
letters and episode marks in one transaction), the readings' reads (one item, many items' windows,
the dashboard's frame, each item's newest time), the dead letters' reads and the counts, and the
readings table's layout (``readings_layout``, ``upgrade_readings``).

A mixin: :class:`ReadingQueries` holds no state of its own; ``Store`` gives it the engine, the
dialect and its transactions.
"""

from __future__ import annotations

import sys
from collections.abc import Iterable, Sequence
from contextlib import AbstractContextManager
from dataclasses import asdict, dataclass
from typing import TYPE_CHECKING, Any

from sqlalchemy import (
    Connection,
    Double,
    Engine,
    Integer,
    and_,
    column,
    func,
    insert,
    inspect,
    select,
    values,
)
from sqlalchemy.exc import IntegrityError
from thermeta.storage.schema import dead_letters, items, readings

CHUNK = 500  # ids per IN (...) list

READING_COLUMNS = ("item_id", "ts", "value_c", "flags", "received_at")
SQLITE_INSERT_READINGS = (
    f"INSERT INTO readings ({', '.join(READING_COLUMNS)}) VALUES (?, ?, ?, ?, ?) "
    "ON CONFLICT (item_id, ts) DO NOTHING"
)


@dataclass(frozen=True)
class DeadLetter:
    """A message set aside: when it came, on which topic, for which item (if known), why, and an
    excerpt of its payload (undecodable bytes escaped)."""

    received_at: float
    topic: str
    item: str | None
    reason: str
    payload: str


class ReadingQueries:
    """The readings' queries of :class:`thermeta.storage.store.Store`."""

    dialect: str
    engine: Engine

    if TYPE_CHECKING:

        def transaction(self) -> AbstractContextManager[Connection]: ...
        def reading(self) -> AbstractContextManager[Connection]: ...
        def item_id(self, name: str) -> int | None: ...
        def _insert_ignore(self, table: Any) -> Any: ...

    # -- the readings table's layout ----------------------------------------------------------
    def readings_layout(self) -> str:
        """``"lean"`` (SQLite WITHOUT ROWID, or PostgreSQL without a time index) or ``"rowid"``
        (a store made before: a rowid table and a time index; it reads the same)."""
        with self.reading() as conn:
            if self.dialect == "sqlite":
                sql = conn.exec_driver_sql(
                    "SELECT sql FROM sqlite_master WHERE type = 'table' AND name = 'readings'"
                ).scalar()
                return "lean" if sql and "WITHOUT ROWID" in sql.upper() else "rowid"
        names = {ix["name"] for ix in inspect(self.engine).get_indexes("readings")}
        return "rowid" if "ix_readings_ts" in names else "lean"

    def upgrade_readings(self) -> bool:
        """Rebuild a store's readings in the lean layout (one transaction; on SQLite a copy, so
        it takes the table's size in free disk and some seconds per million readings).
        Returns whether anything changed."""
        if self.readings_layout() == "lean":
            return False
        with self.transaction() as conn:
            if self.dialect != "sqlite":
                conn.exec_driver_sql("DROP INDEX IF EXISTS ix_readings_ts")
                return True
            cols = ", ".join(READING_COLUMNS)
            conn.exec_driver_sql(
                "CREATE TABLE readings_lean (item_id INTEGER NOT NULL REFERENCES items (id) "
                "ON DELETE CASCADE, ts DOUBLE NOT NULL, value_c DOUBLE NOT NULL, "
                "flags SMALLINT NOT NULL, received_at DOUBLE NOT NULL, "
                "PRIMARY KEY (item_id, ts)) WITHOUT ROWID"
            )
            conn.exec_driver_sql(
                f"INSERT INTO readings_lean ({cols}) SELECT {cols} FROM readings "
                "ORDER BY item_id, ts"
            )
            conn.exec_driver_sql("DROP TABLE readings")
            conn.exec_driver_sql("ALTER TABLE readings_lean RENAME TO readings")
        return True

    # -- the ingest batch ---------------------------------------------------------------------
    def write_batch(
        self,
        reading_rows: Sequence[tuple | dict[str, Any]],
        dead: Sequence[DeadLetter] = (),
        marks: Sequence[Any] = (),
    ) -> int:
        """Insert readings (duplicates of (item_id, ts) ignored) and dead letters, and apply
        episode marks (starts and ends from MQTT, ``storage/episodes.py``), in ONE transaction.

        reading_rows: tuples (item_id, ts, value_c, flags, received_at), or dicts with those keys.
        Returns the number of readings newly stored where the driver reports it, else -1.
        Raises StoreError; nothing of the batch is stored then.
        """
        stored = 0
        rows: list[Any] = list(reading_rows)
        if rows and isinstance(rows[0], tuple):
            if self.dialect != "sqlite":
                rows = [dict(zip(READING_COLUMNS, r)) for r in rows]
        elif rows and self.dialect == "sqlite":
            rows = [tuple(r[c] for c in READING_COLUMNS) for r in rows]
        with self.transaction() as conn:
            if rows and self.dialect == "sqlite":
                # The hot path: the driver's executemany, no per-row SQL compilation.
                res = conn.exec_driver_sql(SQLITE_INSERT_READINGS, rows)
                stored = res.rowcount
            elif rows:
                stmt = self._insert_ignore(readings)
                if stmt is not None:
                    res = conn.execute(stmt, rows)
                    stored = res.rowcount if res.rowcount is not None else -1
                else:
                    stored = self._insert_one_by_one(conn, rows)
            if dead:
                conn.execute(insert(dead_letters), [asdict(d) for d in dead])
            if marks:
                from thermeta.storage.episodes import apply_marks

                apply_marks(conn, list(marks))
        return stored

    @staticmethod
    def _insert_one_by_one(conn: Connection, rows: Iterable[dict[str, Any]]) -> int:
        n = 0
        for row in rows:
            sp = conn.begin_nested()
            try:
                conn.execute(insert(readings).values(**row))
                sp.commit()
                n += 1
            except IntegrityError:
                sp.rollback()
        return n

    # -- reads --------------------------------------------------------------------------------
    def recent_readings(
        self, item: str | int, since_ts: float | None = None, until_ts: float | None = None
    ) -> list[tuple[float, float]]:
        """(ts, value_degC) of one item, oldest first."""
        item_id = item if isinstance(item, int) else self.item_id(item)
        if item_id is None:
            return []
        if self.dialect == "sqlite":
            # The driver's cursor: SQLAlchemy's result rows cost more than the query here.
            sql = "SELECT ts, value_c FROM readings WHERE item_id = ?"
            params: tuple[float, ...] = (item_id,)
            if since_ts is not None:
                sql, params = sql + " AND ts >= ?", (*params, since_ts)
            if until_ts is not None:
                sql, params = sql + " AND ts <= ?", (*params, until_ts)
            with self.reading() as conn:
                cur = conn.connection.dbapi_connection.cursor()  # type: ignore[union-attr]
                try:
                    return cur.execute(sql + " ORDER BY ts", params).fetchall()
                finally:
                    cur.close()
        q = select(readings.c.ts, readings.c.value_c).where(readings.c.item_id == item_id)
        if since_ts is not None:
            q = q.where(readings.c.ts >= since_ts)
        if until_ts is not None:
            q = q.where(readings.c.ts <= until_ts)
        with self.reading() as conn:
            return [(float(t), float(v)) for t, v in conn.execute(q.order_by(readings.c.ts))]

    def windows(
        self, wanted: Sequence[tuple[int, float | None]]
    ) -> dict[int, tuple[list[float], list[float]]]:
        """(ts, value_degC) lists of many items, each from its own ``since`` (None: all), oldest
        first: one query per :data:`CHUNK` items (the refit round's read)."""
        out: dict[int, tuple[list[float], list[float]]] = {}
        for k in range(0, len(wanted), CHUNK):
            # each item from its own start (a silent item's early start reads no one else's)
            w = (
                values(column("item_id", Integer), column("since", Double), name="wanted")
                .data(
                    [
                        (iid, -sys.float_info.max if v is None else v)
                        for iid, v in wanted[k : k + CHUNK]
                    ]
                )
                .cte("wanted")
            )
            q = (
                select(readings.c.item_id, readings.c.ts, readings.c.value_c)
                .select_from(w)
                .join(readings, and_(readings.c.item_id == w.c.item_id, readings.c.ts >= w.c.since))
                .order_by(readings.c.item_id, readings.c.ts)
            )
            with self.reading() as conn:
                rows = _rows(conn, q, self.dialect)
            for iid, t, v in rows:
                got = out.get(iid)
                if got is None:
                    got = out[iid] = ([], [])
                got[0].append(float(t))
                got[1].append(float(v))
        return out

    def recent_series(
        self, since_ts: float, kind: str | None = "load"
    ) -> dict[str, list[tuple[float, float]]]:
        """(ts, value_degC) since ``since_ts`` of every item (of ``kind``) by name, oldest first,
        in ONE query (a seek along the key per item): the dashboard's frame."""
        on = and_(readings.c.item_id == items.c.id, readings.c.ts >= since_ts)
        q = select(items.c.name, readings.c.ts, readings.c.value_c).join(readings, on)
        if kind is not None:
            q = q.where(items.c.kind == kind)
        q = q.order_by(items.c.id, readings.c.ts)
        out: dict[str, list[tuple[float, float]]] = {}
        with self.reading() as conn:
            rows = _rows(conn, q, self.dialect)
            for name, t, v in rows:
                series = out.get(name)
                if series is None:
                    series = out[name] = []
                series.append((float(t), float(v)))
        return out

    def first_reading(self, item: str | int) -> tuple[float, float] | None:
        """(ts, value_degC) of an item's oldest stored reading."""
        item_id = item if isinstance(item, int) else self.item_id(item)
        if item_id is None:
            return None
        q = (
            select(readings.c.ts, readings.c.value_c)
            .where(readings.c.item_id == item_id)
            .order_by(readings.c.ts)
            .limit(1)
        )
        with self.reading() as conn:
            row = conn.execute(q).first()
        return None if row is None else (float(row[0]), float(row[1]))

    def last_reading_times(self) -> dict[str, float]:
        """Newest reading time per item name (one seek along the (item_id, ts) key per item,
        not a scan of the readings)."""
        newest = (
            select(func.max(readings.c.ts))
            .where(readings.c.item_id == items.c.id)
            .scalar_subquery()
        )
        q = select(items.c.name, newest)
        with self.reading() as conn:
            return {name: float(ts) for name, ts in conn.execute(q) if ts is not None}

    def counts(self) -> dict[str, int]:
        with self.reading() as conn:
            return {
                "items": conn.execute(
                    select(func.count()).select_from(items).where(items.c.kind == "load")
                ).scalar_one(),
                "readings": conn.execute(select(func.count()).select_from(readings)).scalar_one(),
                "dead_letters": conn.execute(
                    select(func.count()).select_from(dead_letters)
                ).scalar_one(),
            }

    def recent_dead_letters(self, limit: int = 20) -> list[dict[str, Any]]:
        q = select(dead_letters).order_by(dead_letters.c.id.desc()).limit(limit)
        with self.reading() as conn:
            return [dict(r._mapping) for r in conn.execute(q)]


def _rows(conn: Any, q: Any, dialect: str) -> list[Any]:
    """The rows of a select: on SQLite through the driver's own cursor (SQLAlchemy's result rows
    cost more than the query itself on these reads), elsewhere through SQLAlchemy."""
    if dialect != "sqlite":
        return list(conn.execute(q))
    sql = str(q.compile(conn, compile_kwargs={"literal_binds": True}))
    cur = conn.connection.dbapi_connection.cursor()
    try:
        return cur.execute(sql).fetchall()
    finally:
        cur.close()
