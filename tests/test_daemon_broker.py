"""`thermeta run` against a real Mosquitto (the `broker` fixture): forecasts out, and no reading
lost or doubled across a daemon kill -9, a broker restart, or a flood of malformed payloads."""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path

import numpy as np
import paho.mqtt.client as mqtt
import pytest
from scipy.integrate import solve_ivp
from sqlalchemy import create_engine, text

pytestmark = pytest.mark.broker

REPO = Path(__file__).resolve().parents[1]


def write_config(
    tmp_path: Path,
    broker,
    db_url: str | None = None,
    *,
    items: str,
    client_id: str = "thermeta-test",
    refit_every: float = 1.0,
) -> Path:
    db_url = db_url or f"sqlite:///{tmp_path / 'store.db'}"
    p = tmp_path / "thermeta.toml"
    p.write_text(
        f'[broker]\nhost = "{broker.host}"\nport = {broker.port}\nclient_id = "{client_id}"\n\n'
        f'[storage]\nurl = "{db_url}"\nbatch_size = 200\nbatch_ms = 50\n\n'
        f"[fit]\nrefit_every = {refit_every}\nwindow = 7200\n\n{items}"
    )
    return p


class Daemon:
    """`thermeta run` as its own process, as an operator starts it."""

    def __init__(self, config: Path, log: Path):
        self.config, self.log = config, log
        self.proc: subprocess.Popen | None = None

    def start(self) -> None:
        self._out = open(self.log, "a")
        self.proc = subprocess.Popen(
            [sys.executable, "-m", "thermeta.daemon.cli", "run", "--config", str(self.config)],
            stdout=self._out,
            stderr=subprocess.STDOUT,
            cwd=self.config.parent,
        )
        wait_for(lambda: self.log.read_text().count("connected to") > self.connects, 20, self.log)
        self.connects = self.log.read_text().count("connected to")

    connects = 0

    def kill9(self) -> None:
        self.proc.send_signal(signal.SIGKILL)
        self.proc.wait(10)
        self._out.close()

    def stop(self) -> int:
        if self.proc and self.proc.poll() is None:
            self.proc.send_signal(signal.SIGTERM)
            try:
                return self.proc.wait(20)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait()
                return -9
        return self.proc.returncode if self.proc else 0


def wait_for(cond, timeout: float, log: Path | None = None, step: float = 0.1):
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        got = cond()
        if got:
            return got
        time.sleep(step)
    tail = log.read_text()[-3000:] if log and log.exists() else ""
    raise AssertionError(f"condition not met within {timeout} s\n{tail}")


def count_readings(db_url: str, item: str) -> int:
    eng = create_engine(db_url)
    try:
        with eng.connect() as conn:
            return conn.execute(
                text(
                    "SELECT count(*) FROM readings r JOIN items i ON i.id = r.item_id "
                    "WHERE i.name = :n"
                ),
                {"n": item},
            ).scalar_one()
    finally:
        eng.dispose()


def stored_times(db_url: str, item: str) -> list[float]:
    eng = create_engine(db_url)
    try:
        with eng.connect() as conn:
            return [
                r[0]
                for r in conn.execute(
                    text(
                        "SELECT r.ts FROM readings r JOIN items i ON i.id = r.item_id "
                        "WHERE i.name = :n ORDER BY r.ts"
                    ),
                    {"n": item},
                )
            ]
    finally:
        eng.dispose()


def retained(broker, topic: str) -> dict | None:
    r = subprocess.run(
        [
            "mosquitto_sub",
            "-h",
            broker.host,
            "-p",
            str(broker.port),
            "-t",
            topic,
            "-C",
            "1",
            "-W",
            "2",
        ],
        capture_output=True,
        text=True,
    )
    return json.loads(r.stdout) if r.returncode == 0 and r.stdout.strip() else None


class Publisher:
    """A paho QoS 1 publisher that waits for every PUBACK and resends a chunk after a broker
    outage (resent copies are duplicates the store must absorb)."""

    def __init__(self, broker):
        self.c = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id="h3-test-publisher")
        self.c.reconnect_delay_set(0.2, 1)
        self.c.connect(broker.host, broker.port)
        self.c.loop_start()

    def send(self, messages: list[tuple[str, str]], chunk: int = 100, pace_s: float = 0.0) -> None:
        for i in range(0, len(messages), chunk):
            part = messages[i : i + chunk]
            while True:
                infos = [self.c.publish(t, p, qos=1) for t, p in part]
                try:
                    for info in infos:
                        info.wait_for_publish(5)
                    if all(info.is_published() for info in infos):
                        break
                except (RuntimeError, ValueError):
                    pass
                time.sleep(0.3)  # broker away: try the chunk again once it is back
            if pace_s:
                time.sleep(pace_s)

    def close(self) -> None:
        self.c.disconnect()
        self.c.loop_stop()


def reading_messages(topic: str, t0: float, n: int, start: int = 0) -> list[tuple[str, str]]:
    return [(topic, json.dumps({"ts": t0 + i, "value": 3.0 + 0.001 * i})) for i in range(start, n)]


def test_warming_curve_forecast_is_retained_and_matches_the_truth(broker, tmp_path):
    """A load warming toward a known ambient, published with mosquitto_pub: the retained forecast
    read back with mosquitto_sub gives the crossing time of the exact curve.

    Truth: Newton's law of cooling dT/dt = -k (T - Ta) integrated by scipy's solve_ivp (rtol
    1e-10), with a terminal event at the threshold (the published law; a general-purpose solver).
    """
    k_per_s, ambient, t_start, threshold = 1.0 / 14400.0, 25.0, 2.0, 8.0
    t_rel = np.arange(0.0, 3600.0, 60.0)  # one hour of minute readings
    sol = solve_ivp(
        lambda t, T: -k_per_s * (T - ambient),
        (0, 40000),
        [t_start],
        rtol=1e-10,
        atol=1e-12,
        dense_output=True,
        events=lambda t, T: T[0] - threshold,
    )
    true_crossing_rel = float(sol.t_events[0][0])
    rng = np.random.default_rng(7)
    values = sol.sol(t_rel)[0] + rng.normal(0.0, 0.02, t_rel.size)
    t0 = time.time() - t_rel[-1]
    cfg = write_config(
        tmp_path,
        broker,
        items=(
            '[[item]]\nname = "reefer-07"\ntopic = "yard/reefer-07/load"\nthreshold = 8.0\n'
            "ambient = 25.0\n"
        ),
    )
    daemon = Daemon(cfg, tmp_path / "daemon.log")
    daemon.start()
    try:
        lines = "\n".join(
            json.dumps({"ts": round(t0 + tr, 3), "value": round(float(v), 4)})
            for tr, v in zip(t_rel, values)
        )
        subprocess.run(
            [
                "mosquitto_pub",
                "-h",
                broker.host,
                "-p",
                str(broker.port),
                "-q",
                "1",
                "-t",
                "yard/reefer-07/load",
                "-l",
            ],
            input=lines + "\n",
            text=True,
            check=True,
            timeout=20,
        )
        fc = wait_for(
            lambda: (
                (f := retained(broker, "thermeta/forecast/reefer-07"))
                and f["n_points"] + f["n_outliers"] == t_rel.size
                and f
            ),
            20,
            daemon.log,
        )
        status = retained(broker, "thermeta/status/thermeta-test")
    finally:
        assert daemon.stop() == 0
    assert fc["item"] == "reefer-07" and fc["state"] == "approaching"
    assert fc["ambient_mode"] == "known" and fc["threshold"] == 8.0
    true_eta_s = true_crossing_rel - t_rel[-1]
    assert fc["eta_s"] == pytest.approx(true_eta_s, rel=0.05)
    from thermeta.daemon.timefmt import parse_time

    assert parse_time(fc["crossing_at"]) == pytest.approx(
        t0 + true_crossing_rel, abs=0.05 * true_eta_s
    )
    assert status["state"] == "online"
    assert (
        retained(broker, "thermeta/status/thermeta-test")["state"] == "offline"
    )  # clean stop says so
    # a clean run and stop log nothing at ERROR (paho's own last-loop complaint included)
    assert " ERROR " not in (tmp_path / "daemon.log").read_text()


def test_kill_9_mid_stream_loses_and_doubles_nothing(broker, tmp_path):
    """kill -9 while readings stream in, more published while the daemon is down, then a
    restart: every reading is stored exactly once (manual acks after commit + a persistent
    session + the unique (item, ts) key)."""
    db = f"sqlite:///{tmp_path / 'store.db'}"
    cfg = write_config(
        tmp_path,
        broker,
        db,
        items=('[[item]]\nname = "probe-{2}"\ntopic = "cellar/+/t"\nthreshold = 8.0\n'),
    )
    daemon = Daemon(cfg, tmp_path / "daemon.log")
    daemon.start()
    n, t0 = 3000, time.time() - 4000
    msgs = reading_messages("cellar/a1/t", t0, n)
    pub = Publisher(broker)
    try:
        th = threading.Thread(target=pub.send, args=(msgs[:2000],), kwargs={"pace_s": 0.01})
        th.start()
        wait_for(lambda: count_readings(db, "probe-a1") >= 300, 20, daemon.log, step=0.02)
        daemon.kill9()
        th.join(60)
        mid = count_readings(db, "probe-a1")
        assert mid < 2000  # the kill really came mid-stream
        pub.send(msgs[2000:2500])  # published while the daemon is down
        daemon.start()
        pub.send(msgs[2500:])
        wait_for(lambda: count_readings(db, "probe-a1") >= n, 30, daemon.log)
        time.sleep(0.5)
    finally:
        pub.close()
        assert daemon.stop() == 0
    assert stored_times(db, "probe-a1") == [t0 + i for i in range(n)]


def test_broker_restart_mid_stream_loses_and_doubles_nothing(broker, tmp_path):
    """The broker restarts (keeping its persistence file) while readings stream in: the daemon
    reconnects, resumes its session, and every reading is stored exactly once."""
    db = f"sqlite:///{tmp_path / 'store.db'}"
    cfg = write_config(
        tmp_path,
        broker,
        db,
        items=('[[item]]\nname = "walkin"\ntopic = "kitchen/walkin/t"\nthreshold = 5.0\n'),
    )
    daemon = Daemon(cfg, tmp_path / "daemon.log")
    daemon.start()
    n, t0 = 2000, time.time() - 3000
    msgs = reading_messages("kitchen/walkin/t", t0, n)
    pub = Publisher(broker)
    try:
        th = threading.Thread(target=pub.send, args=(msgs,), kwargs={"pace_s": 0.05})
        th.start()
        wait_for(lambda: count_readings(db, "walkin") >= 300, 20, daemon.log, step=0.02)
        at_restart = count_readings(db, "walkin")
        broker.restart()
        th.join(90)
        wait_for(lambda: count_readings(db, "walkin") >= n, 40, daemon.log)
        time.sleep(0.5)
        log = daemon.log.read_text()
    finally:
        pub.close()
        assert daemon.stop() == 0
    assert at_restart < n  # the restart really came mid-stream
    assert "session resumed" in log
    assert stored_times(db, "walkin") == [t0 + i for i in range(n)]


def test_thousand_malformed_payloads_are_dead_lettered_and_forecasting_goes_on(broker, tmp_path):
    """1,000 malformed payloads mixed into good readings all land in dead letters (acked, not
    redelivered), and the item's forecast keeps being updated."""
    db = f"sqlite:///{tmp_path / 'store.db'}"
    cfg = write_config(
        tmp_path,
        broker,
        db,
        items=(
            '[[item]]\nname = "chiller"\ntopic = "kitchen/chiller/core"\nthreshold = 5.0\n'
            "ambient = -2.0\n"
        ),
    )
    daemon = Daemon(cfg, tmp_path / "daemon.log")
    daemon.start()
    t0 = time.time() - 1200
    noise = np.random.default_rng(11).normal(0.0, 0.03, 120)
    good = [
        json.dumps({"ts": t0 + 10 * i, "value": -2 + 60 * np.exp(-(10 * i) / 1800) + noise[i]})
        for i in range(120)
    ]
    kinds = [
        "NaN",
        '{"value": "hot"}',
        "\xff-not-text",
        '{"ts": 99999999999, "value": 1}',
        '{"value": 1e9}',
        "[{",
        '{"value": Infinity}',
        "x" * 20000,
    ]
    bad = [kinds[i % len(kinds)] for i in range(1000)]
    try:
        first = good[:60]
        subprocess.run(
            [
                "mosquitto_pub",
                "-p",
                str(broker.port),
                "-q",
                "1",
                "-t",
                "kitchen/chiller/core",
                "-l",
            ],
            input="\n".join(first) + "\n",
            text=True,
            check=True,
            timeout=20,
        )
        wait_for(
            lambda: (
                (f := retained(broker, "thermeta/forecast/chiller"))
                and f["n_points"] + f["n_outliers"] == 60
            ),
            20,
            daemon.log,
        )
        pub = Publisher(broker)
        pub.send(
            [("kitchen/chiller/core", b) for b in bad]
            + [("kitchen/chiller/core", g) for g in good[60:]]
        )
        pub.close()
        fc = wait_for(
            lambda: (
                (f := retained(broker, "thermeta/forecast/chiller"))
                and f["n_points"] + f["n_outliers"] == 120
                and f
            ),
            30,
            daemon.log,
        )
        out = subprocess.run(
            [sys.executable, "-m", "thermeta.daemon.cli", "status", "--config", str(cfg), "--json"],
            capture_output=True,
            text=True,
            timeout=30,
        )
    finally:
        assert daemon.stop() == 0
    info = json.loads(out.stdout)
    assert info["dead_letters"] == 1000 and info["readings"] == 120
    assert info["daemon"]["running"] is True
    assert info["per_item"][0]["item"] == "chiller"
    # still forecast: the fit is good and the crossing ahead (steady, or approaching within lead)
    assert fc["state"] in ("steady", "approaching", "crossed") and fc["fit_ok"] is True
    assert fc["eta_s"] is not None
    eng = create_engine(db)
    with eng.connect() as conn:
        reasons = dict(
            conn.execute(text("SELECT reason, count(*) FROM dead_letters GROUP BY reason")).all()
        )
    eng.dispose()
    assert sum(reasons.values()) == 1000 and len(reasons) == len(kinds)
    assert "oversized payload (20000 bytes > 16384)" in reasons


@pytest.mark.postgres
def test_daemon_on_postgresql(broker, pg_url, tmp_path):
    """The same ingest path on PostgreSQL (psycopg): readings stored once, dead letters set aside,
    a retained forecast out, and `thermeta status` reads it all back."""
    import uuid

    schema = f"h3d_{uuid.uuid4().hex[:10]}"
    admin = create_engine(pg_url)
    with admin.begin() as conn:
        conn.execute(text(f"CREATE SCHEMA {schema}"))
    db = f"{pg_url}{'&' if '?' in pg_url else '?'}options=-csearch_path%3D{schema}"
    cfg = write_config(
        tmp_path,
        broker,
        db,
        items=(
            '[[item]]\nname = "blast-{2}"\ntopic = "kitchen/+/core"\nthreshold = 21.0\n'
            "ambient = -5.0\n"
        ),
    )
    daemon = Daemon(cfg, tmp_path / "daemon.log")
    daemon.start()
    try:
        t0 = time.time() - 1800
        noise = np.random.default_rng(13).normal(0.0, 0.03, 180)
        lines = (
            [
                json.dumps(
                    {"ts": t0 + 10 * i, "value": -5 + 62 * np.exp(-(10 * i) / 3600) + noise[i]}
                )
                for i in range(180)
            ]
            + ["not a reading"] * 20
            + [json.dumps({"ts": t0, "value": 57.0})]
        )
        subprocess.run(
            ["mosquitto_pub", "-p", str(broker.port), "-q", "1", "-t", "kitchen/b1/core", "-l"],
            input="\n".join(lines) + "\n",
            text=True,
            check=True,
            timeout=20,
        )
        fc = wait_for(
            lambda: (
                (f := retained(broker, "thermeta/forecast/blast-b1"))
                and f["n_points"] + f["n_outliers"] == 180
                and f
            ),
            30,
            daemon.log,
        )
        out = subprocess.run(
            [sys.executable, "-m", "thermeta.daemon.cli", "status", "--config", str(cfg), "--json"],
            capture_output=True,
            text=True,
            timeout=30,
        )
    finally:
        assert daemon.stop() == 0
        eng = create_engine(db)
        with eng.connect() as conn:
            n = conn.execute(text("SELECT count(*) FROM readings")).scalar_one()
            d = conn.execute(text("SELECT count(*) FROM dead_letters")).scalar_one()
        eng.dispose()
        with admin.begin() as conn:
            conn.execute(text(f"DROP SCHEMA {schema} CASCADE"))
        admin.dispose()
    assert (n, d) == (180, 20)  # the repeated first reading was absorbed
    assert fc["state"] == "approaching" and fc["fit_ok"] is True
    info = json.loads(out.stdout)
    assert info["readings"] == 180 and info["dead_letters"] == 20
    assert (
        info["per_item"][0]["item"] == "blast-b1" and info["per_item"][0]["state"] == "approaching"
    )


def test_password_from_environment_never_logged_json_logs_and_sigint(broker, tmp_path):
    """A broker with a password file: the daemon logs in with the password from the environment
    variable named in the config, never writes it to its (JSON, debug-level) log, and SIGINT
    stops it cleanly (exit 0, the queued readings committed)."""
    import socket

    secret = "Wx9-not-in-any-log-7Q"
    work = tmp_path / "authbroker"
    work.mkdir()
    os.chmod(work, 0o777)
    subprocess.run(
        ["mosquitto_passwd", "-b", "-c", str(work / "passwd"), "thermeta", secret],
        check=True,
        capture_output=True,
    )
    os.chmod(work / "passwd", 0o644)
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    # As root, mosquitto would switch to its own user, which cannot read pytest's 0700 folders.
    as_root = "user root\n" if os.geteuid() == 0 else ""
    (work / "m.conf").write_text(
        f"listener {port} 127.0.0.1\nallow_anonymous false\n"
        f"password_file {work / 'passwd'}\n{as_root}"
    )
    mq = subprocess.Popen(
        ["mosquitto", "-c", str(work / "m.conf")],
        stdout=subprocess.DEVNULL,
        stderr=subprocess.DEVNULL,
    )
    try:
        wait_for(
            lambda: (
                subprocess.run(
                    [
                        "mosquitto_pub",
                        "-p",
                        str(port),
                        "-u",
                        "thermeta",
                        "-P",
                        secret,
                        "-t",
                        "probe/ping",
                        "-m",
                        "1",
                    ]
                ).returncode
                == 0
            ),
            10,
        )
        db = f"sqlite:///{tmp_path / 'store.db'}"
        cfg = tmp_path / "auth.toml"
        cfg.write_text(
            f'[broker]\nport = {port}\nclient_id = "auth-test"\nusername = "thermeta"\n'
            f'password_env = "H3_TEST_MQTT_PW"\n\n[storage]\nurl = "{db}"\n\n'
            '[log]\nlevel = "debug"\n\n'
            '[[item]]\nname = "walkin"\ntopic = "kitchen/walkin/t"\nthreshold = 5.0\n'
        )
        log = tmp_path / "daemon.log"
        out = open(log, "w")
        proc = subprocess.Popen(
            [
                sys.executable,
                "-m",
                "thermeta.daemon.cli",
                "run",
                "--config",
                str(cfg),
                "--log-json",
            ],
            stdout=out,
            stderr=subprocess.STDOUT,
            env=dict(os.environ, H3_TEST_MQTT_PW=secret),
        )
        wait_for(lambda: "connected to" in log.read_text(), 20, log)
        t0 = time.time() - 100
        lines = "\n".join(json.dumps({"ts": t0 + i, "value": 3.0}) for i in range(50))
        subprocess.run(
            [
                "mosquitto_pub",
                "-p",
                str(port),
                "-u",
                "thermeta",
                "-P",
                secret,
                "-q",
                "1",
                "-t",
                "kitchen/walkin/t",
                "-l",
            ],
            input=lines + "\n",
            text=True,
            check=True,
        )
        wait_for(lambda: count_readings(db, "walkin") == 50, 20, log)
        proc.send_signal(signal.SIGINT)
        assert proc.wait(20) == 0
        out.close()
    finally:
        mq.terminate()
        mq.wait(10)
    text_log = log.read_text()
    assert secret not in text_log
    records = [json.loads(line) for line in text_log.splitlines() if line.strip()]
    assert {"time", "level", "logger", "message"} <= set(records[0])
    assert any(r["message"] == "received SIGINT" for r in records)
    assert any(r["message"].startswith("stopped: 50 readings") for r in records)


def _make_certs(d: Path) -> None:
    """A CA, a server certificate for 127.0.0.1 and a client certificate (openssl)."""

    def ossl(*args: str) -> None:
        subprocess.run(["openssl", *args], cwd=d, check=True, capture_output=True)

    ossl(
        "req",
        "-x509",
        "-newkey",
        "rsa:2048",
        "-nodes",
        "-days",
        "2",
        "-subj",
        "/CN=test-ca",
        "-keyout",
        "ca.key",
        "-out",
        "ca.pem",
    )
    for name, ext in (
        ("server", "subjectAltName=IP:127.0.0.1"),
        ("client", "extendedKeyUsage=clientAuth"),
    ):
        ossl(
            "req",
            "-newkey",
            "rsa:2048",
            "-nodes",
            "-subj",
            f"/CN={name}",
            "-keyout",
            f"{name}.key",
            "-out",
            f"{name}.csr",
        )
        (d / f"{name}.ext").write_text(ext + "\n")
        ossl(
            "x509",
            "-req",
            "-in",
            f"{name}.csr",
            "-CA",
            "ca.pem",
            "-CAkey",
            "ca.key",
            "-CAcreateserial",
            "-days",
            "2",
            "-extfile",
            f"{name}.ext",
            "-out",
            f"{name}.pem",
        )
    for p in d.iterdir():
        os.chmod(p, 0o644)


def test_tls_with_client_certificate(broker, tmp_path):
    """TLS from the config (CA file, client certificate and key) against a Mosquitto listener that
    requires a client certificate: readings arrive and are stored."""
    import shutil
    import socket

    if shutil.which("openssl") is None:
        pytest.fail("openssl is needed to make test certificates")
    work = tmp_path / "tls"
    work.mkdir()
    _make_certs(work)
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    as_root = "user root\n" if os.geteuid() == 0 else ""
    (work / "m.conf").write_text(
        f"listener {port} 127.0.0.1\nallow_anonymous true\ncafile {work / 'ca.pem'}\n"
        f"certfile {work / 'server.pem'}\nkeyfile {work / 'server.key'}\n"
        f"require_certificate true\n{as_root}"
    )
    mq = subprocess.Popen(
        ["mosquitto", "-c", str(work / "m.conf")],
        stdout=subprocess.DEVNULL,
        stderr=subprocess.DEVNULL,
    )
    tls_args = [
        "--cafile",
        str(work / "ca.pem"),
        "--cert",
        str(work / "client.pem"),
        "--key",
        str(work / "client.key"),
    ]
    try:
        wait_for(
            lambda: (
                subprocess.run(
                    [
                        "mosquitto_pub",
                        "-h",
                        "127.0.0.1",
                        "-p",
                        str(port),
                        *tls_args,
                        "-t",
                        "probe/ping",
                        "-m",
                        "1",
                    ],
                    capture_output=True,
                ).returncode
                == 0
            ),
            10,
        )
        db = f"sqlite:///{tmp_path / 'store.db'}"
        cfg = tmp_path / "tls.toml"
        cfg.write_text(
            f'[broker]\nhost = "127.0.0.1"\nport = {port}\nclient_id = "tls-test"\n'
            f'ca_file = "{work / "ca.pem"}"\ncert_file = "{work / "client.pem"}"\n'
            f'key_file = "{work / "client.key"}"\n\n[storage]\nurl = "{db}"\n\n'
            '[[item]]\nname = "walkin"\ntopic = "kitchen/walkin/t"\nthreshold = 5.0\n'
        )
        daemon = Daemon(cfg, tmp_path / "daemon.log")
        daemon.start()
        try:
            t0 = time.time() - 100
            lines = "\n".join(json.dumps({"ts": t0 + i, "value": 3.0}) for i in range(30))
            subprocess.run(
                [
                    "mosquitto_pub",
                    "-h",
                    "127.0.0.1",
                    "-p",
                    str(port),
                    *tls_args,
                    "-q",
                    "1",
                    "-t",
                    "kitchen/walkin/t",
                    "-l",
                ],
                input=lines + "\n",
                text=True,
                check=True,
            )
            wait_for(lambda: count_readings(db, "walkin") == 30, 20, daemon.log)
        finally:
            assert daemon.stop() == 0
    finally:
        mq.terminate()
        mq.wait(10)
