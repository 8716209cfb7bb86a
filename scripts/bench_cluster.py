"""Several daemons sharing a site: how many items a daemon carries and how fast a dead one's
items are taken over, measured with real processes (docs/cluster.md).

    THERMETA_TEST_PG_URL=postgresql+psycopg://postgres@127.0.0.1/test \\
        python scripts/bench_cluster.py --items 1000 --daemons 3 --refit-every 8

A Mosquitto of its own on a free port, a fresh schema in the PostgreSQL database, ``--daemons``
``thermeta run`` processes in one [cluster] group, and the invented yard of
``thermeta.daemon.cluster.scenario`` reporting live.  Once every item has its first forecast, one
daemon is killed with SIGKILL; the table gives the refit rounds' time per item before and after,
how long until every item of the dead daemon was refitted by another (from the round log), and,
after the dead daemon came back, whether every reading was stored once and every alert posted
once.  One run, figures from this machine (2 cores shared: quote them as measured).
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import sys
import tempfile
import threading
import time
import uuid
from collections import Counter
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from pathlib import Path

from sqlalchemy import create_engine, text
from thermeta.daemon.cluster.scenario import ITEMS, Stream
from thermeta.daemon.testing import Mosquitto, RunningDaemon, wait_for, write_config


class Receiver(ThreadingHTTPServer):
    """A loopback webhook counting the alerts posted, by id."""

    def __init__(self) -> None:
        self.ids: Counter[str] = Counter()
        outer = self

        class Handler(BaseHTTPRequestHandler):
            def do_POST(self) -> None:
                body = self.rfile.read(int(self.headers.get("Content-Length", 0)))
                outer.ids[json.loads(body)["id"]] += 1
                self.send_response(200)
                self.send_header("Content-Length", "0")
                self.end_headers()

            def log_message(self, *args: object) -> None:
                return

        super().__init__(("127.0.0.1", 0), Handler)
        threading.Thread(target=self.serve_forever, daemon=True).start()


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--items", type=int, default=1000)
    ap.add_argument("--daemons", type=int, default=3)
    ap.add_argument("--refit-every", type=float, default=8.0)
    ap.add_argument("--url", default=os.environ.get("THERMETA_TEST_PG_URL"))
    args = ap.parse_args(argv)
    if not args.url:
        print("bench_cluster: give --url or set THERMETA_TEST_PG_URL", file=sys.stderr)
        return 2
    r, n = args.refit_every, args.items
    schema = f"bench_{uuid.uuid4().hex[:10]}"
    admin = create_engine(args.url)
    with admin.begin() as conn:
        conn.execute(text(f"CREATE SCHEMA {schema}"))
    url = f"{args.url}{'&' if '?' in args.url else '?'}options=-csearch_path%3D{schema}"
    eng = create_engine(url)

    def q(sql: str) -> list:
        with eng.connect() as conn:
            return list(conn.execute(text(sql)))

    hook = Receiver()
    rows: list[tuple[str, str]] = []
    work = Path(tempfile.mkdtemp(prefix="bench-cluster-"))
    (work / "broker").mkdir()
    try:
        with Mosquitto(work / "broker") as broker:
            daemons = []
            for k in range(args.daemons):
                d = work / f"d{k}"
                d.mkdir()
                extra = (
                    '[cluster]\ngroup = "yard"\n\n[[hook]]\nkind = "webhook"\n'
                    f'url = "http://127.0.0.1:{hook.server_address[1]}/"\n'
                )
                cfg = write_config(
                    d,
                    broker,
                    items=ITEMS,
                    db_url=url,
                    client_id=f"node-{k}",
                    refit_every=r,
                    protocol="5",
                    extra=extra,
                )
                daemons.append(RunningDaemon(cfg))
            for dm in daemons:
                dm.start(wait_connected=False)
            for dm in daemons:
                wait_for(lambda dm=dm: "connected to " in dm.text(), 30, dm.log)
            stream = Stream(broker, n, history=12, client_id="bench-stream")
            t0 = time.monotonic()
            stream.start()
            wait_for(
                lambda: q("select count(*) from current_forecasts")[0][0] == n, 600, daemons[0].log
            )
            first_s = time.monotonic() - t0
            time.sleep(3 * r)  # steady rounds
            before = {m: json.loads(b) for m, b in q("select instance, body from cluster_members")}
            victim = daemons[-1]
            victim.kill9()
            killed_at = time.time()
            dead = f"node-{args.daemons - 1}"
            theirs = {x for (x,) in q(f"select item from leases where holder = '{dead}'")}
            wait_for(
                lambda: (
                    q(
                        "select count(distinct item) from cluster_refits "
                        f"where done_at > {killed_at} "
                        f"and instance <> '{dead}'"
                    )[0][0]
                    == n
                ),
                20 * r,
                daemons[0].log,
            )
            firsts = dict(
                q(
                    "select item, min(done_at) from cluster_refits "
                    f"where done_at > {killed_at} group by item"
                )
            )
            took = sorted(firsts[i] - killed_at for i in theirs if i in firsts)
            took_all = max(firsts.values()) - killed_at
            time.sleep(2 * r)
            after = {
                m: json.loads(b)
                for m, b in q("select instance, body from cluster_members")
                if m != dead
            }
            stream.stop.set()
            stream.join(60)
            victim.start()
            want = n * stream.rounds
            wait_for(lambda: q("select count(*) from readings")[0][0] >= want, 300, victim.log)
            wait_for(
                lambda: q("select count(*) from outbox where status = 'pending'")[0][0] == 0, 120
            )
            time.sleep(r)
            for dm in daemons:
                dm.stop()
            stored, distinct = q("select count(*), count(distinct (item_id, ts)) from readings")[0]
            raised = {k for (k,) in q("select key from alert_events")}
            gaps = handover_gaps(q("select item, instance, at from cluster_refits order by 2, 3"))

        def per_item(st: dict) -> str:
            ms = [
                1000 * b["last_round_s"] / b["items_held"]
                for b in st.values()
                if b.get("items_held") and b.get("last_round_s")
            ]
            held = [b.get("items_held", 0) for b in st.values()]
            return f"{statistics.median(ms):.1f} ms/item, held {held}" if ms else "-"

        rows += [
            ("items, daemons, refit_every", f"{n}, {args.daemons}, {r:g} s"),
            ("first forecast of every new item", f"{first_s:.1f} s after the stream began"),
            ("steady round, before the kill", per_item(before)),
            ("steady round, 2 refit_every after the kill", per_item(after)),
            ("dead daemon's items", f"{len(theirs)}"),
            (
                "kill -9 -> its items refitted elsewhere",
                f"median {statistics.median(took):.1f} s, max {took[-1]:.1f} s "
                f"({took[-1] / r:.2f} refit_every)"
                if took
                else "-",
            ),
            ("kill -9 -> every item refitted again", f"{took_all:.1f} s ({took_all / r:.2f} r)"),
            ("readings published / stored / distinct", f"{want} / {stored} / {distinct}"),
            (
                "alerts raised / posted ids / most posts of one",
                f"{len(raised)} / {len(hook.ids)} / {max(hook.ids.values(), default=0)}",
            ),
            ("shortest gap between two daemons' refits", f"{min(gaps):.2f} s" if gaps else "-"),
        ]
    finally:
        hook.shutdown()
        eng.dispose()
        with admin.begin() as conn:
            conn.execute(text(f"DROP SCHEMA {schema} CASCADE"))
        admin.dispose()
    width = max(len(a) for a, _ in rows)
    print(f"| {'what':<{width}} | figure |\n|{'-' * (width + 2)}|---|")
    for a, b in rows:
        print(f"| {a:<{width}} | {b} |")
    return 0


def handover_gaps(log: list) -> list[float]:
    """For each item, the time between consecutive refits by different daemons."""
    by: dict[str, list[tuple[float, str]]] = {}
    for item, inst, at in log:
        by.setdefault(item, []).append((float(at), str(inst)))
    out = []
    for seq in by.values():
        seq.sort()
        out += [b[0] - a[0] for a, b in zip(seq, seq[1:]) if a[1] != b[1]]
    return out


if __name__ == "__main__":
    raise SystemExit(main())
