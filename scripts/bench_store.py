"""What the store costs: bytes a reading, forecast history kept, and ``thermeta readings``
against the same query in the sqlite3 shell.

    python scripts/bench_store.py [--items 1000] [--per-item 1000] [--runs 5] [--keep DIR]

Fills two SQLite stores with the same readings (``--items`` probes, one reading a minute each,
written in time order in batches as the ingest writes them): one with today's schema, one
with the layout stores had before (a rowid table with a time index), and prints:

1. bytes a reading of each (the file after a checkpoint, over the readings in it);
2. forecast history: a refit a minute for two hours of 200 items whose crossing wobbles by
   seconds, then a door opening on a tenth of them; rows and bytes the history kept against one
   row per refit;
3. ``thermeta readings ITEM`` (a whole process) against ``sqlite3 FILE "SELECT ..."`` (the same
   rows, a whole process) and the floor any Python command pays (the interpreter with
   SQLAlchemy imported), medians of ``--runs`` interleaved runs; then the query alone, in
   process: ``Store.recent_readings`` against the sqlite3 module.

The dashboard's frame: ``Store.recent_series`` (one query) against one query per item.
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import sqlite3
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
from sqlalchemy import create_engine, text
from thermeta.storage import schema
from thermeta.storage.store import Store

T0 = 1.8e9
DT_S = 60.0
BATCH = 5000
OLD_READINGS = (
    "CREATE TABLE readings (item_id INTEGER NOT NULL REFERENCES items (id) ON DELETE CASCADE, "
    "ts FLOAT NOT NULL, value_c FLOAT NOT NULL, flags SMALLINT NOT NULL, "
    "received_at FLOAT NOT NULL, PRIMARY KEY (item_id, ts))"
)


def _old_store(url: str) -> None:
    engine = create_engine(url)
    tables = [t for t in schema.metadata.sorted_tables if t.name != "readings"]
    schema.metadata.create_all(engine, tables=tables)
    with engine.begin() as conn:
        conn.execute(text(OLD_READINGS))
        conn.execute(text("CREATE INDEX ix_readings_ts ON readings (ts)"))
    engine.dispose()


def fill(store: Store, n_items: int, per_item: int, seed: int) -> int:
    """Readings of every item, one a minute, written in time order as the ingest writes them."""
    rng = np.random.default_rng(seed)
    ids = list(
        store.ensure_items([(f"probe-{i:05d}", "load", "C", None) for i in range(n_items)]).values()
    )
    offset = rng.uniform(0, DT_S, n_items)
    level = rng.uniform(0, 10, n_items)
    rows: list[tuple] = []
    n = 0
    for j in range(per_item):
        ts = T0 + j * DT_S + offset
        values = np.round(level + 0.002 * j + rng.normal(0, 0.05, n_items), 1)
        recv = ts + rng.uniform(0.05, 0.5, n_items)
        rows.extend(
            (iid, float(t), float(v), 0, float(r)) for iid, t, v, r in zip(ids, ts, values, recv)
        )
        if len(rows) >= BATCH:
            n += store.write_batch(rows)
            rows = []
    if rows:
        n += store.write_batch(rows)
    return n


def bytes_per_reading(path: Path, n: int) -> float:
    con = sqlite3.connect(path)
    con.execute("PRAGMA wal_checkpoint(TRUNCATE)")
    con.close()
    return path.stat().st_size / n


def history(store: Store, n_items: int = 200, minutes: int = 120) -> tuple[int, int, int]:
    """(refits, rows kept, bytes kept) of a refit a minute: crossings wobbling by seconds, and a
    door opening on a tenth of the items half-way (their crossing an hour sooner)."""
    rng = np.random.default_rng(2)
    ids = list(
        store.ensure_items([(f"h-{i:04d}", "load", "C", None) for i in range(n_items)]).values()
    )
    cross = T0 + rng.uniform(3, 8, n_items) * 3600
    kept = 0
    for m in range(minutes):
        now = T0 + m * DT_S
        if m == minutes // 2:
            cross[: n_items // 10] -= 3600.0
        rows = []
        for iid, c in zip(ids, cross):
            eta = float(c - now + rng.normal(0, 20))
            body = {
                "state": "approaching",
                "ok": True,
                "eta_s": eta,
                "eta_lo_s": eta * 0.8,
                "eta_hi_s": eta * 1.25,
                "levels": [{"name": "limit", "state": "approaching", "eta_s": eta}],
                "pad": "x" * 1200,  # a stored forecast is about 1.4 KB
            }
            rows.append((iid, now, "approaching", body, now))
        kept += store.save_forecasts(rows)
    with store.reading() as conn:
        size = conn.execute(text("SELECT sum(length(body)) FROM forecasts")).scalar() or 0
    return n_items * minutes, kept, int(size)


def _wall(cmd: list[str], env: dict[str, str]) -> float:
    t = time.perf_counter()
    subprocess.run(cmd, check=True, stdout=subprocess.DEVNULL, env=env)
    return time.perf_counter() - t


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--items", type=int, default=1000)
    ap.add_argument("--per-item", type=int, default=1000)
    ap.add_argument("--runs", type=int, default=5)
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--keep", metavar="DIR", help="build the stores here and keep them")
    args = ap.parse_args(argv)
    if not shutil.which("sqlite3"):
        print("bench_store: needs the sqlite3 shell (Debian: sqlite3)", file=sys.stderr)
        return 2
    folder = Path(args.keep or tempfile.mkdtemp(prefix="bench_store-"))
    folder.mkdir(parents=True, exist_ok=True)
    lean_db, old_db = folder / "lean.db", folder / "old.db"
    for p in (lean_db, old_db):
        for suffix in ("", "-wal", "-shm"):
            Path(f"{p}{suffix}").unlink(missing_ok=True)
    print(
        f"# bench_store: {args.items} items x {args.per_item} readings, "
        f"{time.strftime('%Y-%m-%d')}\n"
    )

    print("| layout | readings | bytes a reading | fill (readings/s) |")
    print("|---|---:|---:|---:|")
    _old_store(f"sqlite:///{old_db}")
    sizes = {}
    for label, path in (
        ("before: rowid + time index", old_db),
        ("now: WITHOUT ROWID (item_id, ts)", lean_db),
    ):
        store = Store(f"sqlite:///{path}")
        store.create_all()
        t = time.perf_counter()
        n = fill(store, args.items, args.per_item, args.seed)
        rate = n / (time.perf_counter() - t)
        store.close()
        sizes[label] = bytes_per_reading(path, n)
        print(f"| {label} | {n:,} | {sizes[label]:.1f} | {rate:,.0f} |")

    store = Store(f"sqlite:///{lean_db}")
    refits, kept, size = history(store)
    print(
        "\n| forecast history | refits | rows kept | share | bytes kept | bytes, one row a refit |"
    )
    print("|---|---:|---:|---:|---:|---:|")
    print(
        f"| 200 items, a refit a minute for 2 h, a door on 20 | {refits:,} | {kept:,} | "
        f"{kept / refits:.1%} | {size:,} | about {refits * size // max(kept, 1):,} |"
    )

    item = f"probe-{args.items // 2:05d}"
    iid = store.item_id(item)
    cfg = folder / "bench.toml"
    cfg.write_text(
        f'[storage]\nurl = "sqlite:///{lean_db}"\n'
        f'[[item]]\nname = "{item}"\ntopic = "bench/{item}"\nthreshold = 8.0\n'
    )
    env = dict(os.environ)
    exe = Path(sys.executable).parent / "thermeta"
    cmd = [str(exe), "readings", item, "--config", str(cfg)]
    query = f"SELECT ts, value_c FROM readings WHERE item_id = {iid} ORDER BY ts"
    shell = ["sqlite3", str(lean_db), query]
    floor = [sys.executable, "-c", "import sqlalchemy, thermeta.storage.store"]
    times: dict[str, list[float]] = {"cmd": [], "shell": [], "floor": []}
    _wall(cmd, env)
    for _ in range(args.runs):
        times["cmd"].append(_wall(cmd, env))
        times["shell"].append(_wall(shell, env))
        times["floor"].append(_wall(floor, env))
    med = {k: statistics.median(v) * 1000 for k, v in times.items()}
    ratios = statistics.median(c / s for c, s in zip(times["cmd"], times["shell"]))
    print(
        f"\n`readings` of one item ({args.per_item} rows) from "
        f"{args.items * args.per_item:,}, medians of {args.runs}:\n"
    )
    print("| what | ms |")
    print("|---|---:|")
    print(f"| thermeta readings ITEM (process) | {med['cmd']:.1f} |")
    print(f"| sqlite3 shell, same query (process) | {med['shell']:.1f} |")
    print(f"| python -c 'import sqlalchemy, thermeta.storage.store' (floor) | {med['floor']:.1f} |")
    print(f"| ratio command / shell (pairwise median) | {ratios:.1f} x |")

    inproc: dict[str, list[float]] = {"store": [], "sqlite3": []}
    con = sqlite3.connect(lean_db)
    for _ in range(max(args.runs, 5)):
        t = time.perf_counter()
        store.recent_readings(iid)
        inproc["store"].append(time.perf_counter() - t)
        t = time.perf_counter()
        con.execute(query).fetchall()
        inproc["sqlite3"].append(time.perf_counter() - t)
    s_ms = statistics.median(inproc["store"]) * 1000
    q_ms = statistics.median(inproc["sqlite3"]) * 1000
    print(f"| in process: Store.recent_readings | {s_ms:.2f} |")
    print(f"| in process: sqlite3 module, same query | {q_ms:.2f} |")
    print(f"| ratio in process | {s_ms / q_ms:.1f} x |")

    since = T0 + (args.per_item - 180) * DT_S
    names = [f"probe-{i:05d}" for i in range(args.items)]
    t = time.perf_counter()
    one = store.recent_series(since)
    one_ms = (time.perf_counter() - t) * 1000
    t = time.perf_counter()
    each = {n: store.recent_readings(n, since_ts=since) for n in names}
    each_ms = (time.perf_counter() - t) * 1000
    if {k: v for k, v in one.items() if k in each} != each:
        print("bench_store: recent_series disagrees with recent_readings", file=sys.stderr)
        return 1
    print(
        f"\nDashboard frame, 3 h of {args.items} items: one query {one_ms:.0f} ms, "
        f"one per item {each_ms:.0f} ms ({each_ms / one_ms:.1f} x)"
    )
    store.close()
    con.close()
    print(json.dumps({"bytes_per_reading": round(sizes["now: WITHOUT ROWID (item_id, ts)"], 1)}))
    if not args.keep:
        shutil.rmtree(folder, ignore_errors=True)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
