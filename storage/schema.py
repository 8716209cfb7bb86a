"""The store's tables, on ONE shared :data:`metadata` (other modules, e.g. ``storage/alerts.py``,
add their tables to it so ``Store.create_all()`` makes everything).

Times are epoch seconds UTC as double precision; temperatures are canonical degrees Celsius.

    items         one row per item (load probes; ambient probes are items of kind "ambient")
    readings      (item_id, ts) is the primary key: redelivered duplicates are absorbed.  On SQLite
                  a WITHOUT ROWID table: the rows live in the key's own B-tree, about 39 bytes a
                  reading (a rowid table with a time index took 81); no time index: retention
                  deletes item by item along the key (``Store.prune``).  Stores made before keep
                  their rowid table and read the same (``Store.upgrade_readings`` rebuilds it).
    current_forecasts  each item's newest forecast, overwritten by every refit
    forecasts     history: a refit's forecast kept only when it says something new
                  (``storage/forecasts.py``), with its own retention
    dead_letters  payloads set aside, with the reason
    meta          small key/value facts (last_refit_at, readings_per_s, daemon heartbeat)
"""

from __future__ import annotations

from sqlalchemy import (
    BigInteger,
    Column,
    Double,
    ForeignKey,
    Index,
    Integer,
    MetaData,
    SmallInteger,
    String,
    Table,
    Text,
)

metadata = MetaData()

# SQLite only makes INTEGER PRIMARY KEY an auto-increment rowid; PostgreSQL wants BIGINT.
_Id = BigInteger().with_variant(Integer(), "sqlite")

items = Table(
    "items",
    metadata,
    Column("id", Integer, primary_key=True, autoincrement=True),
    Column("name", String(200), nullable=False, unique=True),
    Column("kind", String(16), nullable=False, default="load"),  # "load" | "ambient"
    Column("unit", String(1), nullable=False, default="C"),  # the unit the operator configured
    Column("topic", String(512)),
    Column("created_at", Double, nullable=False),
    Column("last_reading_at", Double),  # refreshed at refit time, not per reading
    Column("state", String(16)),
)

# Flags on a reading (bit field).
FLAG_RECEIPT_TS = 1  # the payload carried no time: timestamped on receipt

readings = Table(
    "readings",
    metadata,
    Column("item_id", Integer, ForeignKey("items.id", ondelete="CASCADE"), primary_key=True),
    Column("ts", Double, primary_key=True),
    Column("value_c", Double, nullable=False),
    Column("flags", SmallInteger, nullable=False, default=0),
    Column("received_at", Double, nullable=False),
    # The primary key (item_id, ts) is the only index: every read and retention go along it.
    sqlite_with_rowid=False,
)

forecasts = Table(
    "forecasts",
    metadata,
    Column("id", _Id, primary_key=True, autoincrement=True),
    Column("item_id", Integer, ForeignKey("items.id", ondelete="CASCADE"), nullable=False),
    Column("made_at", Double, nullable=False),
    Column("state", String(16), nullable=False),
    Column("eta_s", Double),
    Column("body", Text, nullable=False),  # the published JSON
    Index("ix_forecasts_item_made", "item_id", "made_at"),
)

current_forecasts = Table(
    "current_forecasts",
    metadata,
    Column(
        "item_id",
        Integer,
        ForeignKey("items.id", ondelete="CASCADE"),
        primary_key=True,
        autoincrement=False,
    ),
    Column("made_at", Double, nullable=False),
    Column("state", String(16), nullable=False),
    Column("eta_s", Double),
    Column("body", Text, nullable=False),  # the published JSON
)

dead_letters = Table(
    "dead_letters",
    metadata,
    Column("id", _Id, primary_key=True, autoincrement=True),
    Column("received_at", Double, nullable=False),
    Column("topic", String(1024), nullable=False),
    Column("item", String(200)),
    Column("reason", String(300), nullable=False),
    Column("payload", Text, nullable=False),  # truncated, undecodable bytes escaped
    Index("ix_dead_letters_received", "received_at"),
)

meta = Table(
    "meta",
    metadata,
    Column("key", String(100), primary_key=True),
    Column("value", Text),
)
