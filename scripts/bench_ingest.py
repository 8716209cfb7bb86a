#!/usr/bin/env python3
# The backslash lets the first line, which is the --help description, run to the margin.
"""\
End-to-end ingest throughput of `thermeta run` beside a bare paho subscriber, same broker, same run.

    python scripts/bench_ingest.py [--messages 100000] [--items 1000] [--repeat 3]

For each repeat, on one Mosquitto of our own (free loopback port, persistence on, unlimited
queue, in-flight window --inflight):

1. raw: a bare paho-mqtt QoS 1 subscriber (automatic acks, JSON decode only) receives N messages
   published by a paho QoS 1 publisher over --items topics, once with MQTT 3.1.1 (paho's
   default) and once with MQTT 5 (thermeta's default);
2. thermeta: `thermeta run` (a separate process, SQLite store, the config's default batching)
   receives the same N messages; done when all N readings are committed (acks follow each commit).

--mode drain (default): the N messages are published while the subscriber is away and wait in its
persistent session; the rate is N / (last message received - first received) for the bare
subscriber and N / (last reading committed - first received, the daemon's own receipt stamp)
for thermeta.  This measures
the subscriber, not the publisher (on 2 cores a paho publisher is slower than a subscriber).
--mode live: published while the subscriber runs; rate = N / (last - publisher start).
Peak RSS is the subscriber process's high-water mark.  CPU per 1,000 messages: the subscriber's
CPU time (all threads; for thermeta also its refit worker processes) from its first message to
its last (thermeta: its last commit), per 1,000 messages; unlike the rates it hardly depends on
what else runs on the machine.  Prints the medians and the ratios, per repeat, measured in the
same run, and the load average.
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

from thermeta.daemon.testing import Mosquitto

PUBLISHER = r"""
import json, sys, time
import paho.mqtt.client as mqtt
port, n, items, t0 = int(sys.argv[1]), int(sys.argv[2]), int(sys.argv[3]), float(sys.argv[4])
c = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id="bench-pub")
c.max_inflight_messages_set(1000)
c.max_queued_messages_set(0)
c.connect("127.0.0.1", port)
c.loop_start()
start = time.time()
window = []
for i in range(n):
    item = i % items
    payload = json.dumps({"ts": t0 + i // items, "value": 4.0 + (i % 97) * 0.01})
    window.append(c.publish(f"bench/i{item:04d}/t", payload, qos=1))
    if len(window) >= 20000:  # paho holds at most 65,535 unacknowledged messages
        for w in window:
            w.wait_for_publish(60)
        window = []
for w in window:
    w.wait_for_publish(60)
end = time.time()
c.disconnect()
c.loop_stop()
print(json.dumps({"start": start, "end": end}))
"""

RAW_SUB = r"""
import json, resource, sys, time
import paho.mqtt.client as mqtt
port, n, mode = int(sys.argv[1]), int(sys.argv[2]), sys.argv[3]
state = {"got": 0, "first": None, "last": None, "subscribed": False, "cpu0": 0.0, "cpu1": 0.0}
def on_connect(c, u, f, rc, p):
    c.subscribe("bench/#", qos=1)
def on_subscribe(c, u, mid, rcs, p):
    state["subscribed"] = True
    print("ready", flush=True)
def on_message(c, u, m):
    json.loads(m.payload)
    state["got"] += 1
    now = time.time()
    if state["first"] is None:
        state["first"], state["cpu0"] = now, time.process_time()
    state["last"], state["cpu1"] = now, time.process_time()
v5 = len(sys.argv) > 4 and sys.argv[4] == "5"
if v5:
    from paho.mqtt.packettypes import PacketTypes
    from paho.mqtt.properties import Properties
    props = Properties(PacketTypes.CONNECT)
    props.SessionExpiryInterval = 3600
    c = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id="bench-raw5", protocol=mqtt.MQTTv5)
else:
    c = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id="bench-raw", clean_session=False)
c.on_connect, c.on_subscribe, c.on_message = on_connect, on_subscribe, on_message
if v5:
    c.connect("127.0.0.1", port, clean_start=False, properties=props)
else:
    c.connect("127.0.0.1", port)
c.loop_start()
deadline = time.time() + 600
while time.time() < deadline and (
    state["got"] < n if mode != "register" else not state["subscribed"]
):
    time.sleep(0.005)
c.disconnect()
c.loop_stop()
rss_kb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
print(json.dumps({"got": state["got"], "first": state["first"], "last": state["last"],
                  "rss_kb": rss_kb, "cpu_s": state["cpu1"] - state["cpu0"]}), flush=True)
"""


def publish(port: int, n: int, items: int, t0: float) -> dict:
    out = subprocess.run(
        [sys.executable, "-c", PUBLISHER, str(port), str(n), str(items), str(t0)],
        capture_output=True,
        text=True,
        timeout=900,
        check=True,
    )
    return json.loads(out.stdout)


def run_raw(port: int, n: int, items: int, t0: float, mode: str, raw_protocol: str) -> dict:
    def sub(m: str) -> subprocess.Popen:
        p = subprocess.Popen(
            [sys.executable, "-c", RAW_SUB, str(port), str(n), m, raw_protocol],
            stdout=subprocess.PIPE,
            text=True,
        )
        assert p.stdout is not None
        if p.stdout.readline().strip() != "ready":
            raise SystemExit("raw subscriber did not start")
        return p

    if mode == "drain":
        reg = sub("register")  # a persistent session that holds what is published next
        reg.communicate(timeout=30)
        pub = publish(port, n, items, t0)
        proc = sub("drain")
    else:
        proc = sub("live")
        pub = publish(port, n, items, t0)
    res = json.loads(proc.stdout.readline())
    proc.wait(60)
    wipe_session(port, "bench-raw5" if raw_protocol == "5" else "bench-raw")
    if res["got"] != n:
        raise SystemExit(f"raw subscriber got {res['got']} of {n}")
    start = res["first"] if mode == "drain" else pub["start"]
    return {
        "rate": n / (res["last"] - start),
        "rss_mb": res["rss_kb"] / 1024,
        "pub_rate": n / (pub["end"] - pub["start"]),
        "cpu_ms_k": res["cpu_s"] / n * 1e6,
    }


def wipe_session(port: int, client_id: str) -> None:
    """End a subscriber's persistent session so it stops queueing the next repeat's messages."""
    import paho.mqtt.client as mqtt

    c = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id=client_id, protocol=mqtt.MQTTv5)
    c.connect("127.0.0.1", port, clean_start=True)  # no SessionExpiryInterval: gone on close
    c.loop_start()
    time.sleep(0.3)
    c.disconnect()
    c.loop_stop()


def vm_hwm_mb(pid: int) -> float:
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith("VmHWM:"):
            return int(line.split()[1]) / 1024
    return float("nan")


def cpu_s(pid: int) -> float:
    """CPU seconds (user + system) of process ``pid`` and every process under it (the refit
    workers), from /proc (a few small reads, so polling it steals little from the daemon)."""
    total, todo, seen = 0, [pid], set()
    while todo:
        p = todo.pop()
        if p in seen:
            continue
        seen.add(p)
        try:
            fields = Path(f"/proc/{p}/stat").read_text().rsplit(")", 1)[1].split()
            total += int(fields[11]) + int(fields[12])
            for task in Path(f"/proc/{p}/task").iterdir():
                todo.extend(int(c) for c in (task / "children").read_text().split())
        except (OSError, IndexError, ValueError):
            pass
    return total / os.sysconf("SC_CLK_TCK")


def start_daemon(
    cfg: Path, log_path: Path, samples: list[tuple[float, float]] | None = None
) -> subprocess.Popen:
    """Start `thermeta run`; ``samples`` gets (wall time, CPU seconds) every 20 ms meanwhile."""
    log = open(log_path, "a")
    before = log_path.read_text().count("watching") if log_path.exists() else 0
    proc = subprocess.Popen(
        [sys.executable, "-m", "thermeta.daemon.cli", "run", "--config", str(cfg)],
        stdout=log,
        stderr=subprocess.STDOUT,
    )
    log.close()
    deadline = time.monotonic() + 30
    settle = None
    while settle is None or time.monotonic() < settle:  # then 0.5 s for the SUBACK to arrive
        if settle is None and log_path.read_text().count("watching") > before:
            settle = time.monotonic() + 0.5
        if time.monotonic() > deadline or proc.poll() is not None:
            raise SystemExit("thermeta run did not start:\n" + log_path.read_text())
        if samples is not None:
            samples.append((time.time(), cpu_s(proc.pid)))
        time.sleep(0.02)
    return proc


def stop_daemon(proc: subprocess.Popen) -> None:
    proc.terminate()
    proc.wait(60)


def run_thermeta(port: int, n: int, items: int, t0: float, workdir: Path, args) -> dict:
    import threading

    db = workdir / "bench.db"
    for p in workdir.glob("bench.db*"):
        p.unlink()
    cfg = workdir / "bench.toml"
    client_id = f"bench-thermeta-{time.time_ns()}"
    batch = (
        f"batch_size = {args.batch_size}\nbatch_ms = {args.batch_ms}\n" if args.batch_size else ""
    )
    cfg.write_text(
        f'[broker]\nhost = "127.0.0.1"\nport = {port}\nclient_id = "{client_id}"\n'
        f'protocol = "{args.protocol}"\nreceive_maximum = {args.receive_maximum}\n\n'
        f'[storage]\nurl = "sqlite:///{db}"\n{batch}\n[fit]\nrefit_every = {args.refit_every}\n\n'
        f'[[item]]\nname = "probe-{{2}}"\ntopic = "bench/+/t"\nthreshold = 8.0\nambient = 25.0\n'
    )
    log_path = workdir / "daemon.log"
    samples: list[tuple[float, float]] = []  # (wall time, the daemon's CPU seconds)
    proc = start_daemon(cfg, log_path)
    samples.append((time.time(), cpu_s(proc.pid)))
    result: dict = {}
    try:
        if args.mode == "drain":
            stop_daemon(proc)  # its session keeps what is published while it is away
            result.update(publish(port, n, items, t0))
            proc = start_daemon(cfg, log_path, samples)
            th = None
        else:
            th = threading.Thread(target=lambda: result.update(publish(port, n, items, t0)))
            th.start()
        done_at = None
        last = n - 1
        last_key = (t0 + last // items, f"probe-i{last % items:04d}")
        conn = None
        deadline = time.monotonic() + 900
        while time.monotonic() < deadline:
            try:
                conn = conn or sqlite3.connect(db, timeout=30)
                # The broker delivers one session's messages in order and the daemon commits them
                # in order, so the last one published being stored means all are: one probe of
                # the (item_id, ts) key, where count(*) would scan the table every poll and steal
                # CPU from the daemon.
                done = conn.execute(
                    "SELECT 1 FROM readings WHERE ts = ? AND item_id = "
                    "(SELECT id FROM items WHERE name = ?)",
                    last_key,
                ).fetchone()
            except sqlite3.OperationalError:
                done = None
            if done:
                done_at = time.time()
                done_cpu = cpu_s(proc.pid)
                break
            samples.append((time.time(), cpu_s(proc.pid)))
            time.sleep(0.02)
        assert conn is not None
        first_at = conn.execute("SELECT min(received_at) FROM readings").fetchone()[0]
        stored = conn.execute("SELECT count(*) FROM readings").fetchone()[0]
        conn.close()
        if stored != n:
            raise SystemExit(f"thermeta stored {stored} readings, expected {n}")
        if th is not None:
            th.join()
        rss = vm_hwm_mb(proc.pid)
        if done_at is None:
            raise SystemExit(f"thermeta stored {stored} of {n} within the time allowed")
    finally:
        stop_daemon(proc)
        wipe_session(port, client_id)
    start = first_at if args.mode == "drain" else result["start"]
    # the daemon's CPU from its first message to the last commit: the last sample before it
    cpu_start = max((c for t, c in samples if t <= first_at), default=samples[0][1])
    return {
        "rate": n / (done_at - start),
        "rss_mb": rss,
        "pub_rate": n / (result["end"] - result["start"]),
        "cpu_ms_k": (done_cpu - cpu_start) / n * 1e6,
    }


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--messages", type=int, default=100_000)
    ap.add_argument("--items", type=int, default=1000)
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument(
        "--inflight",
        type=int,
        default=4000,
        help="broker max_inflight_messages (the window of an MQTT 3.1.1 subscriber; as in "
        "config/mosquitto.conf)",
    )
    ap.add_argument("--batch-size", type=int, default=0, help="[storage] batch_size (0: default)")
    ap.add_argument("--batch-ms", type=int, default=200)
    ap.add_argument("--refit-every", type=float, default=30.0)
    ap.add_argument(
        "--protocol",
        choices=["auto", "5", "3.1.1"],
        default="auto",
        help="thermeta's MQTT version (the bare subscriber uses paho's default, 3.1.1)",
    )
    ap.add_argument(
        "--receive-maximum", type=int, default=4000, help="[broker] receive_maximum (the default)"
    )
    ap.add_argument(
        "--mode",
        choices=["drain", "live"],
        default="drain",
        help="drain: N messages wait in each subscriber's session, then it connects "
        "(measures the subscriber, not the publisher); live: published while "
        "it runs",
    )
    args = ap.parse_args()
    if shutil.which("mosquitto") is None:
        print("mosquitto is not installed (apt-get install mosquitto)", file=sys.stderr)
        return 2
    raw: list[dict] = []  # bare paho, MQTT 3.1.1 (paho's default)
    raw5: list[dict] = []  # bare paho, MQTT 5 (what thermeta speaks by default)
    ours: list[dict] = []
    loads = [os.getloadavg()[0]]
    with tempfile.TemporaryDirectory(prefix="thermeta-bench-") as tmp:
        work = Path(tmp)
        broker = Mosquitto(work, max_inflight_messages=args.inflight, autosave_interval_s=60)
        port = broker.start().port
        try:
            for r in range(args.repeat):
                t0 = 1_790_000_000.0 + r * 10 * args.messages
                raw.append(run_raw(port, args.messages, args.items, t0, args.mode, "3.1.1"))
                raw5.append(run_raw(port, args.messages, args.items, t0 + 1, args.mode, "5"))
                ours.append(run_thermeta(port, args.messages, args.items, t0 + 2, work, args))
                print(
                    f"  repeat {r + 1}: raw 3.1.1 {raw[-1]['rate']:,.0f}/s, raw 5 "
                    f"{raw5[-1]['rate']:,.0f}/s, thermeta {ours[-1]['rate']:,.0f}/s; CPU ms per "
                    f"1,000: {raw[-1]['cpu_ms_k']:.1f}, {raw5[-1]['cpu_ms_k']:.1f}, "
                    f"{ours[-1]['cpu_ms_k']:.1f}; load average {os.getloadavg()[0]:.1f}",
                    file=sys.stderr,
                )
        finally:
            broker.stop()
    loads.append(os.getloadavg()[0])
    med = lambda rows, k: statistics.median(x[k] for x in rows)  # noqa: E731
    proto = {"auto": "MQTT 5", "5": "MQTT 5", "3.1.1": "MQTT 3.1.1"}[args.protocol]
    print(
        f"\n{args.messages:,} QoS 1 messages over {args.items:,} items, {args.repeat} repeats "
        f"(medians), mode {args.mode}, broker max_inflight_messages {args.inflight}, "
        f"{os.cpu_count()} CPUs, load average {loads[0]:.1f} at the start, {loads[1]:.1f} at "
        "the end\n"
    )
    print(
        "| subscriber | received/committed per s | CPU ms per 1,000 | publisher per s "
        "| peak RSS MB |"
    )
    print("|---|---:|---:|---:|---:|")
    for label, rows in (
        ("bare paho, MQTT 3.1.1 (decode only)", raw),
        ("bare paho, MQTT 5 (decode only)", raw5),
        (f"thermeta run, {proto} (parse, commit, ack)", ours),
    ):
        print(
            f"| {label} | {med(rows, 'rate'):,.0f} | {med(rows, 'cpu_ms_k'):.1f} | "
            f"{med(rows, 'pub_rate'):,.0f} | {med(rows, 'rss_mb'):.0f} |"
        )
    for label, base in (("bare paho 3.1.1", raw), ("bare paho 5", raw5)):
        ratios = [o["rate"] / r["rate"] for o, r in zip(ours, base)]
        cpu = [r["cpu_ms_k"] / o["cpu_ms_k"] for o, r in zip(ours, base)]
        print(
            f"\nratio thermeta / {label}: median {statistics.median(ratios):.2f} "
            f"(per repeat: {', '.join(f'{x:.2f}' for x in ratios)}); target >= 0.70; "
            f"CPU per message, {label} / thermeta: median {statistics.median(cpu):.2f}"
        )
    return 0


if __name__ == "__main__":
    sys.exit(main())
