"""Soak `thermeta run`: a real Mosquitto, a real store, live probes for a given time and load,
optionally a kill -9 every so often; prints the daemon's resources over time and the no-loss
figures at the end.

    python scripts/soak.py --minutes 15 --items 200 --every 1      # the long form, by hand
    python scripts/soak.py --minutes 1 --items 20 --kill-every 20  # a short one

Each row: elapsed time, readings acknowledged by the broker (sent) and stored, the daemon's RSS,
threads and open file descriptors, the SQLite WAL's size, and the last refit round's time (from
the daemon's heartbeat).  The end: sent / stored / lost / doubled, restarts, RSS growth from the
first sample after warm-up to the last.  Every reading has its own time stamp, so "stored" counts
each at most once and "lost" is sent minus stored.
"""

from __future__ import annotations

import argparse
import json
import sys
import tempfile
import threading
import time
from pathlib import Path

import paho.mqtt.client as mqtt
from sqlalchemy import create_engine, text
from thermeta.daemon.testing import Mosquitto, RunningDaemon, wait_for, write_config

ITEMS = (
    '[[item]]\nname = "{2}"\ntopic = "soak/+/t"\nthreshold = 8.0\nambient = 20.0\nsilence = 120\n'
)


class Probes(threading.Thread):
    """``items`` probes, each publishing one reading every ``every_s`` (QoS 1); counts the
    readings the broker acknowledged."""

    def __init__(self, port: int, items: int, every_s: float, stamp_step_s: float, t0: float):
        super().__init__(daemon=True)
        self.items, self.every_s = items, every_s
        self.stamp_step_s, self.t0 = stamp_step_s, t0
        self.acked = 0
        self._lock = threading.Lock()
        self.halt = threading.Event()
        self.c = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id="soak-probes")
        self.c.on_publish = self._on_publish
        self.c.max_inflight_messages_set(1000)
        self.c.connect("127.0.0.1", port)
        self.c.loop_start()

    def _on_publish(self, client, userdata, mid, reason_code, properties) -> None:
        with self._lock:
            self.acked += 1

    def run(self) -> None:
        t0 = self.t0
        k = 0
        next_at = time.monotonic()
        while not self.halt.is_set():
            for i in range(self.items):
                value = 20.0 - 16.0 * 0.9995**k + 0.01 * (i % 7)
                body = json.dumps({"ts": t0 + k * self.stamp_step_s, "value": round(value, 4)})
                self.c.publish(f"soak/p{i:04d}/t", body, qos=1)
            k += 1
            next_at += self.every_s
            self.halt.wait(max(0.0, next_at - time.monotonic()))

    def stop(self) -> None:
        self.halt.set()
        self.join(10)
        deadline = time.monotonic() + 30
        while self.c.want_write() and time.monotonic() < deadline:
            time.sleep(0.1)
        time.sleep(1.0)  # the last PUBACKs
        self.c.disconnect()
        self.c.loop_stop()


def proc_stats(pid: int) -> tuple[float, int, int]:
    """(RSS MB, threads, open file descriptors) of process ``pid``."""
    rss, threads = 0.0, 0
    try:
        for line in Path(f"/proc/{pid}/status").read_text().splitlines():
            if line.startswith("VmRSS:"):
                rss = int(line.split()[1]) / 1024
            elif line.startswith("Threads:"):
                threads = int(line.split()[1])
        fds = len(list(Path(f"/proc/{pid}/fd").iterdir()))
    except OSError:
        return 0.0, 0, 0
    return rss, threads, fds


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--minutes", type=float, default=1.0, help="how long to run (default 1)")
    ap.add_argument("--items", type=int, default=20, help="probes (default 20)")
    ap.add_argument("--every", type=float, default=1.0, help="seconds between a probe's readings")
    ap.add_argument("--kill-every", type=float, default=0.0, help="kill -9 the daemon every S s")
    ap.add_argument("--report-every", type=float, default=10.0, help="seconds between rows")
    ap.add_argument("--refit-every", type=float, default=10.0)
    ap.add_argument(
        "--stamp-step",
        type=float,
        default=None,
        help="seconds between a probe's time stamps (default --every); larger fills the fit "
        "window sooner, to see memory once every window is full",
    )
    args = ap.parse_args(argv)

    work = Path(tempfile.mkdtemp(prefix="thermeta-soak-"))
    db = work / "store.db"
    url = f"sqlite:///{db}"
    (work / "broker").mkdir()
    with Mosquitto(work / "broker") as broker:
        cfg = write_config(work, broker, items=ITEMS, db_url=url, refit_every=args.refit_every)
        daemon = RunningDaemon(cfg).start()
        eng = create_engine(url)

        def stored() -> int:
            with eng.connect() as conn:
                return int(conn.execute(text("SELECT count(*) FROM readings")).scalar_one())

        def last_round_s() -> float | None:
            with eng.connect() as conn:
                row = conn.execute(text("SELECT value FROM meta WHERE key = 'daemon'")).scalar()
            return json.loads(row).get("last_refit_s") if row else None

        step = args.every if args.stamp_step is None else args.stamp_step
        ticks = args.minutes * 60 / args.every
        t0 = time.time() - step * ticks - 600  # the newest stamps stay in the past
        probes = Probes(broker.port, args.items, args.every, step, t0)
        probes.start()
        print(
            f"soak: {args.items} probes every {args.every:g} s for {args.minutes:g} min"
            + (f", stamps {step:g} s apart" if step != args.every else "")
            + (f", kill -9 every {args.kill_every:g} s" if args.kill_every else "")
            + f"; store {db}"
        )
        head = f"{'t s':>6} {'sent':>8} {'stored':>8} {'RSS MB':>7} {'thr':>4} {'fds':>4}"
        print(head + f" {'WAL MB':>7} {'round s':>8}")
        began = time.monotonic()
        end_at = began + args.minutes * 60
        next_kill = began + args.kill_every if args.kill_every else float("inf")
        restarts = 0
        rss_first: float | None = None
        rss_last = 0.0
        while time.monotonic() < end_at:
            time.sleep(min(args.report_every, max(0.0, end_at - time.monotonic())))
            if time.monotonic() >= next_kill:
                daemon.kill9()
                daemon.start()
                restarts += 1
                next_kill += args.kill_every
            assert daemon.proc is not None
            rss, threads, fds = proc_stats(daemon.proc.pid)
            wal = db.with_name(db.name + "-wal")
            wal_mb = wal.stat().st_size / 1e6 if wal.exists() else 0.0
            elapsed = time.monotonic() - began
            if rss_first is None and elapsed >= min(30.0, args.minutes * 30):
                rss_first = rss  # after warm-up (imports, first rounds)
            rss_last = rss
            round_s = last_round_s()
            print(
                f"{elapsed:6.0f} {probes.acked:8d} {stored():8d} {rss:7.1f} {threads:4d} {fds:4d}"
                f" {wal_mb:7.2f} {round_s if round_s is not None else float('nan'):8.2f}",
                flush=True,
            )
        probes.stop()
        sent = probes.acked
        try:
            wait_for(lambda: stored() >= sent, 60)
        except AssertionError:
            pass
        code = daemon.stop()
        got = stored()
        with eng.connect() as conn:
            distinct = int(
                conn.execute(
                    text("SELECT count(*) FROM (SELECT DISTINCT item_id, ts FROM readings) d")
                ).scalar_one()
            )
        eng.dispose()
    growth = rss_last - (rss_first if rss_first is not None else rss_last)
    print()
    print(f"{'readings sent (acked by the broker)':40} {sent:10d}")
    print(f"{'readings stored':40} {got:10d}")
    print(f"{'lost (sent - stored)':40} {sent - got:10d}")
    print(f"{'stored twice':40} {got - distinct:10d}")
    print(f"{'restarts (kill -9)':40} {restarts:10d}")
    print(f"{'RSS growth after warm-up, MB':40} {growth:10.1f}")
    print(f"{'exit code on SIGTERM':40} {code:10d}")
    return 0 if sent == got == distinct and code == 0 else 1


if __name__ == "__main__":
    sys.exit(main())
