"""Every query thermeta makes, on SQLite (default) or PostgreSQL (psycopg), through SQLAlchemy 2.x.

Durability: the daemon acknowledges a reading to the broker only after the transaction holding it
commits, so SQLite runs with ``journal_mode=WAL`` and ``synchronous=FULL`` (NORMAL may roll back a
committed transaction on power loss); batching keeps FULL cheap.  Writers take SQLite's lock up
front (``BEGIN IMMEDIATE``) so they wait for the busy timeout instead of failing half-way.
"""

from __future__ import annotations

import importlib
import json
import logging
import sqlite3
import threading
import time
from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass, field
from typing import Any

from sqlalchemy import (
    Connection,
    Engine,
    and_,
    bindparam,
    create_engine,
    delete,
    event,
    func,
    insert,
    inspect,
    select,
    update,
)
from sqlalchemy.engine import make_url
from sqlalchemy.exc import DataError, IntegrityError, SQLAlchemyError
from thermeta.storage import schema
from thermeta.storage.errors import StoreError, StoreRefused
from thermeta.storage.forecasts import Said, said, says_new
from thermeta.storage.readings import (
    CHUNK,
    READING_COLUMNS,
    SQLITE_INSERT_READINGS,
    DeadLetter,
    ReadingQueries,
)
from thermeta.storage.schema import (
    current_forecasts,
    dead_letters,
    forecasts,
    items,
    meta,
    readings,
)

__all__ = [
    "BUSY_TIMEOUT_MS",
    "CHUNK",
    "INSTANCE_BEAT",
    "PLUGIN_MODULES",
    "READING_COLUMNS",
    "SQLITE_INSERT_READINGS",
    "DeadLetter",
    "Store",
    "StoredForecast",
    "instance_beat_key",
    "safe_url",
    "store_errors",
]

log = logging.getLogger("thermeta.store")

BUSY_TIMEOUT_MS = 15000
PLUGIN_MODULES = (
    "thermeta.storage.alerts",
    "thermeta.storage.priors",
    "thermeta.storage.episodes",
)  # other parts' tables, joined to schema.metadata


@dataclass(frozen=True)
class StoredForecast:
    """A stored forecast: the item, its state then, when it was made (epoch s) and its JSON."""

    item: str
    state: str
    made_at: float
    forecast: dict[str, Any]


@dataclass
class _Batch:
    """A :meth:`Store.batch` under way: its connection and what to call after it."""

    conn: Any = None
    after: list[Callable[[], Any]] = field(default_factory=list)
    undo: list[Callable[[], Any]] = field(default_factory=list)


def _call_each(fns: list[Callable[[], Any]], what: str) -> None:
    for fn in fns:
        try:
            fn()
        except Exception:  # noqa: BLE001 - one caller's callback does not stop the others
            log.exception("a callback %s failed", what)


INSTANCE_BEAT = "daemon:"  # + a [cluster] instance: that daemon's own heartbeat in ``meta``


def instance_beat_key(instance: str) -> str:
    """The ``meta`` key of one daemon's heartbeat in a group (its body names the instance in
    full; the key holds at most 100 characters)."""
    return (INSTANCE_BEAT + instance)[:100]


def safe_url(url: str) -> str:
    """The URL with any password masked, for logs and messages."""
    try:
        return make_url(url).render_as_string(hide_password=True)
    except Exception:  # noqa: BLE001 - an unparseable URL is shown without its tail
        return url.split("@")[-1]


@contextmanager
def store_errors(what: str) -> Iterator[None]:
    """Raise SQLAlchemy's errors (the driver's wrapped in them) as :class:`StoreError`.

    The one place where the database library's errors become thermeta's: every query runs inside
    it (through :meth:`Store.transaction` and :meth:`Store.reading`).
    """
    try:
        yield
    except (DataError, IntegrityError) as exc:  # the rows themselves: trying again cannot help
        raise StoreRefused(f"{what}: {exc.__class__.__name__}: {str(exc).splitlines()[0]}") from exc
    except (SQLAlchemyError, sqlite3.Error) as exc:  # sqlite3's: the readings' raw cursor
        raise StoreError(f"{what}: {exc.__class__.__name__}: {str(exc).splitlines()[0]}") from exc


def _sqlite_pragmas(engine: Engine) -> None:
    @event.listens_for(engine, "connect")
    def _on_connect(dbapi_conn: Any, _record: Any) -> None:
        # Driver-level autocommit: SQLAlchemy's "begin" event below emits BEGIN itself.
        dbapi_conn.isolation_level = None
        cur = dbapi_conn.cursor()
        cur.execute("PRAGMA journal_mode=WAL")
        cur.execute("PRAGMA synchronous=FULL")
        cur.execute(f"PRAGMA busy_timeout={BUSY_TIMEOUT_MS}")
        cur.close()

    @event.listens_for(engine, "begin")
    def _on_begin(conn: Connection) -> None:
        immediate = conn.get_execution_options().get("sqlite_immediate", False)
        conn.exec_driver_sql("BEGIN IMMEDIATE" if immediate else "BEGIN")


class Store(ReadingQueries):
    """The store behind one SQLAlchemy URL (its readings' queries: ``storage/readings.py``)."""

    def __init__(self, url: str, *, echo: bool = False):
        self.url = url
        try:
            u = make_url(url)
        except Exception as exc:  # noqa: BLE001 - SQLAlchemy raises ArgumentError and others
            raise StoreError(f"not a database URL: {safe_url(url)!r} ({exc})") from exc
        self.dialect = u.get_backend_name()
        kwargs: dict[str, Any] = {"echo": echo, "future": True}
        if self.dialect == "sqlite":
            kwargs["connect_args"] = {"check_same_thread": False, "timeout": BUSY_TIMEOUT_MS / 1000}
        else:
            kwargs["pool_pre_ping"] = True
        try:
            self.engine = create_engine(url, **kwargs)
        except Exception as exc:  # noqa: BLE001 - missing driver, bad options
            raise StoreError(f"cannot open store {safe_url(url)}: {exc}") from exc
        if self.dialect == "sqlite":
            _sqlite_pragmas(self.engine)
        self._item_ids: dict[str, int] = {}
        self._kept: dict[int, Said | None] = {}  # each item's newest forecast in the history
        self._has_current: bool | None = None  # whether current_forecasts exists (old stores)
        self._local = threading.local()  # this thread's batch (``batch()``), if one is open

    # -- life cycle ---------------------------------------------------------------------------
    def create_all(self) -> None:
        """Create every table (ours and any plug-in module's) that does not exist yet."""
        for name in PLUGIN_MODULES:
            try:
                importlib.import_module(name)
            except ModuleNotFoundError as exc:
                if exc.name != name:
                    raise
        with store_errors(f"cannot create tables in {safe_url(self.url)}"):
            fresh = not inspect(self.engine).has_table("current_forecasts")
            schema.metadata.create_all(self.engine)
        self._has_current = True
        if fresh:
            # A store made before the table existed: each item's newest forecast becomes current.
            newest = select(func.max(forecasts.c.id)).group_by(forecasts.c.item_id)
            cols = ("item_id", "made_at", "state", "eta_s", "body")
            with self.transaction() as conn:
                conn.execute(
                    insert(current_forecasts).from_select(
                        cols,
                        select(*(forecasts.c[c] for c in cols)).where(forecasts.c.id.in_(newest)),
                    )
                )

    def has_table(self, name: str = "readings") -> bool:
        """Whether the store holds table ``name`` (by default: whether it is a thermeta store at
        all, not an empty database)."""
        with store_errors(f"cannot read {safe_url(self.url)}"):
            return inspect(self.engine).has_table(name)

    def close(self) -> None:
        self.engine.dispose()

    @contextmanager
    def transaction(self) -> Iterator[Connection]:
        """A connection inside one write transaction, committed when the block ends (SQLite: the
        write lock taken up front); database errors come out as :class:`StoreError`.  Inside
        :meth:`batch` (on the same thread) the block is a savepoint of the batch's transaction:
        undone alone if it raises, committed with the batch."""
        joined = self._batch()
        if joined is not None:
            with store_errors("write failed"), joined.conn.begin_nested():
                yield joined.conn
            return
        with store_errors("write failed"):
            conn = self.engine.connect().execution_options(sqlite_immediate=True)
            with conn, conn.begin():
                yield conn

    @contextmanager
    def reading(self) -> Iterator[Connection]:
        """A connection for reads; database errors come out as :class:`StoreError`.  Inside
        :meth:`batch` it is the batch's own (its writes so far are seen)."""
        joined = self._batch()
        if joined is not None:
            with store_errors("read failed"):
                yield joined.conn
            return
        with store_errors("read failed"), self.engine.connect() as conn:
            yield conn

    @contextmanager
    def batch(self) -> Iterator[None]:
        """One write transaction for many small writes: each :meth:`transaction` this thread
        opens inside the block joins it as a savepoint, and the whole commits once (one fsync
        on SQLite, where a transaction each costs one).  A refit chunk's forecasts, the levels'
        sides and prior lessons decided for it and the alert rules' states go in one.

        Callbacks given to :meth:`after_commit` run once the batch committed; if it does not
        (the block raised, or the commit failed), those given to :meth:`on_rollback` run and
        the error is raised.  A batch inside a batch is part of the outer one."""
        if self._batch() is not None:
            yield
            return
        joined = _Batch()
        try:
            with self.transaction() as conn:
                joined.conn = conn
                self._local.batch = joined
                try:
                    yield
                finally:
                    self._local.batch = None
        except BaseException:
            _call_each(joined.undo, "undoing a rolled back batch")
            raise
        _call_each(joined.after, "after a batch's commit")

    def after_commit(self, fn: Callable[[], Any]) -> None:
        """Call ``fn`` once what was written so far is committed: at once outside a batch."""
        joined = self._batch()
        if joined is None:
            fn()
        else:
            joined.after.append(fn)

    def on_rollback(self, fn: Callable[[], Any]) -> None:
        """Call ``fn`` if the batch under way is rolled back after all (outside a batch the
        caller's transaction has committed already: nothing to do)."""
        joined = self._batch()
        if joined is not None:
            joined.undo.append(fn)

    def _batch(self) -> _Batch | None:
        return getattr(self._local, "batch", None)

    def _insert_ignore(self, table: Any) -> Any:
        if self.dialect == "sqlite":
            from sqlalchemy.dialects import sqlite

            return sqlite.insert(table).on_conflict_do_nothing()
        if self.dialect == "postgresql":
            from sqlalchemy.dialects import postgresql

            return postgresql.insert(table).on_conflict_do_nothing()
        return None

    # -- items --------------------------------------------------------------------------------
    def ensure_item(
        self,
        name: str,
        *,
        kind: str = "load",
        unit: str = "C",
        topic: str | None = None,
        now: float | None = None,
    ) -> int:
        """The id of item ``name``, creating it if new."""
        if name in self._item_ids:
            return self._item_ids[name]
        row = {
            "name": name,
            "kind": kind,
            "unit": unit,
            "topic": topic,
            "created_at": time.time() if now is None else now,
        }
        with self.transaction() as conn:
            found = conn.execute(select(items.c.id).where(items.c.name == name)).scalar()
            if found is None:
                found = conn.execute(insert(items).values(**row).returning(items.c.id)).scalar_one()
            else:
                conn.execute(update(items).where(items.c.id == found).values(unit=unit, kind=kind))
        self._item_ids[name] = int(found)
        return int(found)

    def ensure_items(
        self, specs: Sequence[tuple[str, str, str, str | None]], now: float | None = None
    ) -> dict[str, int]:
        """Ids of many items at once, creating the new ones in ONE transaction.

        specs: (name, kind, unit, topic) tuples.  A site's first minute brings hundreds of new
        probes; one commit each would stall ingest on fsyncs.
        """
        want = {
            name: (kind, unit, topic)
            for name, kind, unit, topic in specs
            if name not in self._item_ids
        }
        created = time.time() if now is None else now
        names = list(want)
        for i in range(0, len(names), 500):
            chunk = names[i : i + 500]
            with self.transaction() as conn:
                found: dict[str, int] = dict(
                    conn.execute(
                        select(items.c.name, items.c.id).where(items.c.name.in_(chunk))
                    ).all()
                )
                new = [
                    {
                        "name": n,
                        "kind": want[n][0],
                        "unit": want[n][1],
                        "topic": want[n][2],
                        "created_at": created,
                    }
                    for n in chunk
                    if n not in found
                ]
                if new:  # another daemon of a [cluster] group may add the same item at once
                    ignore = self._insert_ignore(items)
                    conn.execute(insert(items) if ignore is None else ignore, new)
                    found.update(
                        conn.execute(
                            select(items.c.name, items.c.id).where(
                                items.c.name.in_([r["name"] for r in new])
                            )
                        ).all()
                    )
            self._item_ids.update({n: int(v) for n, v in found.items()})
        return {name: self._item_ids[name] for name, *_ in specs}

    def item_id(self, name: str) -> int | None:
        if name in self._item_ids:
            return self._item_ids[name]
        with self.reading() as conn:
            found = conn.execute(select(items.c.id).where(items.c.name == name)).scalar()
        if found is not None:
            self._item_ids[name] = int(found)
        return None if found is None else int(found)

    def item_ids(self, names: Sequence[str]) -> dict[str, int]:
        """The ids of those of ``names`` that are items (one query per 500 names)."""
        want = [n for n in dict.fromkeys(names) if n not in self._item_ids]
        for i in range(0, len(want), 500):
            q = select(items.c.name, items.c.id).where(items.c.name.in_(want[i : i + 500]))
            with self.reading() as conn:
                self._item_ids.update({str(n): int(v) for n, v in conn.execute(q)})
        return {n: self._item_ids[n] for n in names if n in self._item_ids}

    def list_items(self, kind: str | None = "load") -> list[dict[str, Any]]:
        q = select(items).order_by(items.c.name)
        if kind is not None:
            q = q.where(items.c.kind == kind)
        with self.reading() as conn:
            return [dict(r._mapping) for r in conn.execute(q)]

    # -- forecasts ----------------------------------------------------------------------------
    def save_forecast(
        self,
        item_id: int,
        made_at: float,
        state: str,
        body: dict[str, Any],
        last_reading_at: float | None,
    ) -> None:
        self.save_forecasts([(item_id, made_at, state, body, last_reading_at)])

    def save_forecasts(
        self, rows: Sequence[tuple[int, float, str, dict[str, Any], float | None]]
    ) -> int:
        """Many (item_id, made_at, state, body, last_reading_at) in one transaction: each item's
        current forecast overwritten, and kept in the history when it says something new
        (``storage/forecasts.py``).  Returns how many went into the history."""
        if not rows:
            return 0
        self._load_kept([r[0] for r in rows if r[0] not in self._kept])
        current = [
            {"item_id": i, "made_at": m, "state": s, "eta_s": b.get("eta_s"), "body": json.dumps(b)}
            for i, m, s, b, _ in rows
        ]
        kept: dict[int, Said] = {}
        history = []
        for row, (i, m, _, b, _) in zip(current, rows):
            now = said(m, b)
            if says_new(kept.get(i) or self._kept.get(i), now):
                kept[i] = now
                history.append(row)
        with self.transaction() as conn:
            if self._has_current is None:
                self._has_current = inspect(conn).has_table("current_forecasts")
            if self._has_current:
                self._upsert_current(conn, current)
            else:  # a store made before the table: the history holds every forecast
                history = current
            if history:
                conn.execute(insert(forecasts), history)
            conn.execute(
                update(items)
                .where(items.c.id == bindparam("iid"))
                .values(state=bindparam("st"), last_reading_at=bindparam("last")),
                [{"iid": i, "st": s, "last": last} for i, _, s, _, last in rows],
            )
        self.after_commit(lambda: self._kept.update(kept))
        return len(history)

    def _upsert_current(self, conn: Connection, rows: list[dict[str, Any]]) -> None:
        by_item = {r["item_id"]: r for r in rows}  # the newest of an item's rows in the batch
        values = list(by_item.values())
        if self.dialect in ("sqlite", "postgresql"):
            from sqlalchemy.dialects import postgresql, sqlite

            upsert = sqlite if self.dialect == "sqlite" else postgresql
            stmt: Any = upsert.insert(current_forecasts)
            conn.execute(
                stmt.on_conflict_do_update(
                    index_elements=[current_forecasts.c.item_id],
                    set_={c: stmt.excluded[c] for c in ("made_at", "state", "eta_s", "body")},
                ),
                values,
            )
            return
        conn.execute(delete(current_forecasts).where(current_forecasts.c.item_id.in_(by_item)))
        conn.execute(insert(current_forecasts), values)

    def _load_kept(self, item_ids: list[int]) -> None:
        """Each item's newest forecast in the history, what the next one is compared with."""
        ids = list(dict.fromkeys(item_ids))
        for k in range(0, len(ids), CHUNK):
            chunk = ids[k : k + CHUNK]
            newest = (
                select(func.max(forecasts.c.id))
                .where(forecasts.c.item_id.in_(chunk))
                .group_by(forecasts.c.item_id)
            )
            q = select(forecasts.c.item_id, forecasts.c.made_at, forecasts.c.body).where(
                forecasts.c.id.in_(newest)
            )
            with self.reading() as conn:
                found = {i: said(float(m), json.loads(b)) for i, m, b in conn.execute(q)}
            self._kept.update({i: found.get(i) for i in chunk})

    def _current_table(self) -> bool:
        if self._has_current is None:
            self._has_current = self.has_table("current_forecasts")
        return self._has_current

    def latest_forecasts(self) -> list[StoredForecast]:
        """The current forecast of each item, by item name."""
        if self._current_table():
            f = current_forecasts
            q = select(items.c.name, f.c.state, f.c.made_at, f.c.body).join(
                items, items.c.id == f.c.item_id
            )
        else:  # a store made before current_forecasts: the history's newest
            newest = select(func.max(forecasts.c.id)).group_by(forecasts.c.item_id)
            q = (
                select(items.c.name, forecasts.c.state, forecasts.c.made_at, forecasts.c.body)
                .join(items, items.c.id == forecasts.c.item_id)
                .where(forecasts.c.id.in_(newest))
            )
        with self.reading() as conn:
            return [
                StoredForecast(n, s, float(m), json.loads(b))
                for n, s, m, b in conn.execute(q.order_by(items.c.name))
            ]

    def forecast_history(
        self,
        item: str,
        limit: int = 100,
        since: float | None = None,
        until: float | None = None,
    ) -> list[StoredForecast]:
        """The item's forecasts that said something new (made within [since, until] when
        given), newest first; the current one leads when it is newer than the history's
        newest."""
        item_id = self.item_id(item)
        if item_id is None:
            return []
        q = (
            select(forecasts.c.made_at, forecasts.c.state, forecasts.c.body)
            .where(forecasts.c.item_id == item_id)
            .order_by(forecasts.c.id.desc())
            .limit(limit)
        )
        cq = select(
            current_forecasts.c.made_at, current_forecasts.c.state, current_forecasts.c.body
        ).where(current_forecasts.c.item_id == item_id)
        if since is not None:
            q = q.where(forecasts.c.made_at >= since)
            cq = cq.where(current_forecasts.c.made_at >= since)
        if until is not None:
            q = q.where(forecasts.c.made_at <= until)
            cq = cq.where(current_forecasts.c.made_at <= until)
        with self.reading() as conn:
            rows = list(conn.execute(q))
            now = conn.execute(cq).first() if self._current_table() else None
        if now is not None and (not rows or float(now[0]) > float(rows[0][0])):
            rows = [now, *rows][:limit]
        return [StoredForecast(item, s, float(m), json.loads(b)) for m, s, b in rows]

    # -- meta ---------------------------------------------------------------------------------
    def set_meta(self, key: str, value: Any) -> None:
        text = json.dumps(value)
        with self.transaction() as conn:
            done = conn.execute(update(meta).where(meta.c.key == key).values(value=text)).rowcount
            if not done:
                conn.execute(insert(meta).values(key=key, value=text))

    def get_meta(self, key: str, default: Any = None) -> Any:
        with self.reading() as conn:
            text = conn.execute(select(meta.c.value).where(meta.c.key == key)).scalar()
        return default if text is None else json.loads(text)

    def meta_with_prefix(self, prefix: str) -> dict[str, Any]:
        """Every ``meta`` value whose key starts with ``prefix``, by key."""
        q = select(meta.c.key, meta.c.value).where(meta.c.key.startswith(prefix, autoescape=True))
        with self.reading() as conn:
            return {k: json.loads(v) for k, v in conn.execute(q) if v is not None}

    def last_refit_at(self) -> float | None:
        value = self.get_meta("last_refit_at")
        return None if value is None else float(value)

    # -- retention ----------------------------------------------------------------------------
    def prune(self, before_ts: float, history_before_ts: float | None = None) -> dict[str, int]:
        """Delete readings and dead letters older than ``before_ts``, and forecast history older
        than ``history_before_ts`` (default: the same); each item's current forecast stays.

        Readings go item by item along the (item_id, ts) key: the lean table has no time index.
        """
        history_before = before_ts if history_before_ts is None else history_before_ts
        with self.transaction() as conn:
            ids = list(conn.execute(select(items.c.id)).scalars())
            r = 0
            for k in range(0, len(ids), CHUNK):
                r += conn.execute(
                    delete(readings)
                    .where(readings.c.item_id.in_(ids[k : k + CHUNK]))
                    .where(readings.c.ts < before_ts)
                ).rowcount
            old = forecasts.c.made_at < history_before
            if not self._current_table():  # the history's newest is the current one then
                newest = select(func.max(forecasts.c.id)).group_by(forecasts.c.item_id)
                old = and_(old, forecasts.c.id.not_in(newest))
            f = conn.execute(delete(forecasts).where(old)).rowcount
            d = conn.execute(
                delete(dead_letters).where(dead_letters.c.received_at < before_ts)
            ).rowcount
        self._kept.clear()  # the history's newest may be gone
        return {"readings": r, "forecasts": f, "dead_letters": d}
