"""Helpers for tests and benches, ours and users': a real Mosquitto of one's own, ``thermeta run``
as a real process, and a publisher that waits for the broker's acknowledgements.

    with Mosquitto(workdir) as broker:       # a free loopback port, a config file in workdir
        publish_to(broker.host, broker.port)
        broker.restart()                      # same port; sessions and queued messages kept

    cfg = write_config(workdir, broker, items=ITEM_TOML)
    with RunningDaemon(cfg) as d:             # `thermeta run --config cfg`, log in workdir
        publish(broker, readings("site/a/load", t0, 100))
        wait_for(lambda: count_readings(url, "a") == 100, 10, d.log)

The broker keeps what a durable subscriber needs (``persistence true``, no limit on queued
messages) and never touches a broker already running on 1883.  It needs the ``mosquitto`` binary
(Debian: ``apt-get install mosquitto``).
"""

from __future__ import annotations

import json
import os
import shutil
import signal
import socket
import subprocess
import sys
import time
from collections.abc import Callable, Iterable
from dataclasses import dataclass, field
from pathlib import Path
from types import TracebackType
from typing import TypeVar

T = TypeVar("T")


def free_port(host: str = "127.0.0.1") -> int:
    """A TCP port nobody listens on right now."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind((host, 0))
        return int(s.getsockname()[1])


def wait_port(port: int, host: str = "127.0.0.1", timeout: float = 10.0) -> None:
    """Return once ``host:port`` accepts a connection; TimeoutError after ``timeout`` s."""
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        try:
            with socket.create_connection((host, port), timeout=0.2):
                return
        except OSError:
            time.sleep(0.05)
    raise TimeoutError(f"nothing listens on {host}:{port} after {timeout:g} s")


@dataclass
class Mosquitto:
    """A Mosquitto process on a free loopback port, configured in ``workdir``."""

    workdir: Path
    port: int = field(default_factory=free_port)
    host: str = "127.0.0.1"
    max_inflight_messages: int = 1000  # per client: unacknowledged QoS 1 messages in flight
    autosave_interval_s: int = 1  # how often the persistence file is written
    proc: subprocess.Popen[bytes] | None = None

    @property
    def conf(self) -> Path:
        return Path(self.workdir) / "mosquitto.conf"

    def start(self) -> Mosquitto:
        self.conf.write_text(
            f"listener {self.port} {self.host}\n"
            "allow_anonymous true\n"
            "persistence true\n"
            f"persistence_location {self.workdir}/\n"
            f"autosave_interval {self.autosave_interval_s}\n"
            "max_queued_messages 0\n"
            f"max_inflight_messages {self.max_inflight_messages}\n"
            f"log_dest file {self.workdir}/mosquitto.log\n"
            # As root, mosquitto drops to user `mosquitto`, which cannot write into a 0700 temp
            # dir: no persistence file, so a restart would lose every session.
            + ("user root\n" if os.geteuid() == 0 else "")
        )
        self.proc = subprocess.Popen(
            [shutil.which("mosquitto") or "mosquitto", "-c", str(self.conf)],
            stdout=subprocess.DEVNULL,
            stderr=subprocess.DEVNULL,
        )
        try:
            wait_port(self.port, self.host)
        except TimeoutError:
            self.stop()
            raise
        return self

    def stop(self) -> None:
        if self.proc and self.proc.poll() is None:
            self.proc.terminate()
            try:
                self.proc.wait(10)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait()
        self.proc = None

    def restart(self) -> None:
        self.stop()
        self.start()

    def __enter__(self) -> Mosquitto:
        return self.start()

    def __exit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        self.stop()


# -- the daemon as an operator runs it -----------------------------------------------------------
def write_config(
    workdir: Path,
    broker: Mosquitto,
    *,
    items: str,
    db_url: str | None = None,
    client_id: str = "thermeta-test",
    refit_every: float = 1.0,
    extra: str = "",
    protocol: str = "auto",
) -> Path:
    """A config file ``workdir/thermeta.toml`` for ``broker``: the store (SQLite in ``workdir``
    unless ``db_url``), small batches, a refit every ``refit_every`` s, then ``extra`` tables
    and the ``items`` ([[item]] tables, TOML text)."""
    db_url = db_url or f"sqlite:///{Path(workdir) / 'store.db'}"
    path = Path(workdir) / "thermeta.toml"
    path.write_text(
        f'[broker]\nhost = "{broker.host}"\nport = {broker.port}\nclient_id = "{client_id}"\n'
        f'protocol = "{protocol}"\n\n'
        f'[storage]\nurl = "{db_url}"\nbatch_size = 200\nbatch_ms = 50\n\n'
        f"[fit]\nrefit_every = {refit_every}\nwindow = 7200\n\n{extra}\n\n{items}\n"
    )
    return path


def wait_for(
    cond: Callable[[], T], timeout: float, log: Path | None = None, step: float = 0.1
) -> T:
    """``cond()``'s first true value, polled every ``step`` s; AssertionError (with the log's
    tail) after ``timeout`` s."""
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        got = cond()
        if got:
            return got
        time.sleep(step)
    tail = log.read_text(errors="replace")[-3000:] if log and log.exists() else ""
    raise AssertionError(f"condition not met within {timeout} s\n{tail}")


class RunningDaemon:
    """``thermeta run --config CONFIG`` as its own process, its output appended to ``log``
    (default: ``daemon.log`` beside the config).  :meth:`start` returns once it has connected."""

    def __init__(
        self,
        config: Path,
        log: Path | None = None,
        env: dict[str, str] | None = None,
        args: Iterable[str] = (),
        wait_connected: bool = True,
    ):
        self.config = Path(config)
        self.log = log or self.config.parent / "daemon.log"
        self.env = env
        self.args = list(args)
        self.wait_connected = wait_connected
        self.proc: subprocess.Popen[bytes] | None = None
        self._connects = 0

    def text(self) -> str:
        return self.log.read_text(errors="replace") if self.log.exists() else ""

    def start(self, wait_connected: bool | None = None, timeout: float = 20.0) -> RunningDaemon:
        self._connects = self.text().count("connected to ")
        with open(self.log, "ab") as out:
            self.proc = subprocess.Popen(
                [sys.executable, "-m", "thermeta.daemon.cli", "run", "--config", str(self.config)]
                + self.args,
                stdout=out,
                stderr=subprocess.STDOUT,
                cwd=self.config.parent,
                env=self.env,
            )
        if self.wait_connected if wait_connected is None else wait_connected:
            wait_for(lambda: self.text().count("connected to ") > self._connects, timeout, self.log)
        return self

    def kill9(self) -> None:
        if self.proc and self.proc.poll() is None:
            self.proc.send_signal(signal.SIGKILL)
            self.proc.wait(10)

    def stop(self, timeout: float = 20.0) -> int:
        """SIGTERM, then the exit code (-9 if it had to be killed after ``timeout`` s)."""
        if self.proc is None:
            return 0
        if self.proc.poll() is None:
            self.proc.send_signal(signal.SIGTERM)
            try:
                return self.proc.wait(timeout)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait()
                return -9
        return int(self.proc.returncode)

    def __enter__(self) -> RunningDaemon:
        return self.start()

    def __exit__(self, *exc: object) -> None:
        self.stop()


FAKETIME_LIBS = (
    "/usr/lib/x86_64-linux-gnu/faketime/libfaketimeMT.so.1",
    "/usr/lib/aarch64-linux-gnu/faketime/libfaketimeMT.so.1",
    "/usr/lib/faketime/libfaketimeMT.so.1",
)


def faketime_env(offset_file: Path) -> dict[str, str] | None:
    """An environment in which a process's wall clock is shifted by the offset written in
    ``offset_file`` (libfaketime: "+0", "-3600", "+1h"; read again at most once a second, so
    writing the file steps the clock of the running process within a second); its monotonic
    clock stays true.  None when libfaketime is not installed (Debian: ``apt-get install
    libfaketime``).  Not FAKETIME_NO_CACHE: reading the file at every clock call (each GIL
    hand-over between the daemon's threads makes one) kept a round of three items past 60 s."""
    lib = next((p for p in FAKETIME_LIBS if Path(p).exists()), None)
    if lib is None:
        return None
    if not Path(offset_file).exists():
        Path(offset_file).write_text("+0\n")
    return dict(
        os.environ,
        LD_PRELOAD=lib,
        FAKETIME_TIMESTAMP_FILE=str(offset_file),
        FAKETIME_CACHE_DURATION="1",
        FAKETIME_DONT_FAKE_MONOTONIC="1",
    )


# -- publishing ------------------------------------------------------------------------------------
def readings(topic: str, t0: float, n: int, start: int = 0, step_s: float = 1.0) -> list[tuple]:
    """``n`` JSON readings ``{"ts", "value"}`` on ``topic``, ``step_s`` apart from ``t0``."""
    return [
        (topic, json.dumps({"ts": t0 + i * step_s, "value": round(3.0 + 0.001 * i, 4)}))
        for i in range(start, start + n)
    ]


def publish(
    broker: Mosquitto,
    messages: Iterable[tuple[str, str | bytes]],
    *,
    qos: int = 1,
    chunk: int = 200,
    client_id: str = "thermeta-test-publisher",
) -> None:
    """Publish ``(topic, payload)`` pairs at ``qos``, waiting for the broker's acknowledgement
    of each chunk (a client cannot hold more than 65,535 in flight)."""
    import paho.mqtt.client as mqtt

    c = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id=client_id)
    c.connect(broker.host, broker.port)
    c.loop_start()
    try:
        pending = list(messages)
        for i in range(0, len(pending), chunk):
            infos = [c.publish(t, p, qos=qos) for t, p in pending[i : i + chunk]]
            for info in infos:
                info.wait_for_publish(10)
    finally:
        c.disconnect()
        c.loop_stop()


class Sensors:
    """Probes reporting live: a reading on each of ``topics`` every ``every_s`` s from a thread
    (QoS 1), stamped with the true time (``stamped=False``: no time, the daemon stamps it)."""

    def __init__(
        self,
        broker: Mosquitto,
        topics: Iterable[str],
        every_s: float = 0.5,
        stamped: bool = True,
        client_id: str = "thermeta-test-sensors",
    ):
        import threading

        import paho.mqtt.client as mqtt

        self.topics, self.every_s, self.stamped = list(topics), every_s, stamped
        self.sent = 0
        self.client = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id=client_id)
        self.client.connect(broker.host, broker.port)
        self.client.loop_start()
        self._halt = threading.Event()
        self._thread = threading.Thread(target=self._run, name="test-sensors", daemon=True)

    def _run(self) -> None:
        i = 0
        while not self._halt.wait(self.every_s):
            for topic in self.topics:
                body: dict[str, float] = {"value": round(4.0 + 0.001 * i, 4)}
                if self.stamped:
                    body["ts"] = time.time()
                self.client.publish(topic, json.dumps(body), qos=1)
                self.sent += 1
            i += 1

    def start(self) -> Sensors:
        self._thread.start()
        return self

    def stop(self) -> None:
        self._halt.set()
        if self._thread.is_alive():
            self._thread.join(5)
        self.client.disconnect()
        self.client.loop_stop()

    def __enter__(self) -> Sensors:
        return self.start()

    def __exit__(self, *exc: object) -> None:
        self.stop()


def count_readings(db_url: str, item: str) -> int:
    """How many readings the store at ``db_url`` holds for ``item``."""
    from sqlalchemy import create_engine, text

    eng = create_engine(db_url)
    try:
        with eng.connect() as conn:
            return int(
                conn.execute(
                    text(
                        "SELECT count(*) FROM readings r JOIN items i ON i.id = r.item_id "
                        "WHERE i.name = :n"
                    ),
                    {"n": item},
                ).scalar_one()
            )
    finally:
        eng.dispose()


def dead_letter_reasons(db_url: str) -> list[str]:
    """Every dead letter's reason in the store at ``db_url``, oldest first."""
    from sqlalchemy import create_engine, text

    eng = create_engine(db_url)
    try:
        with eng.connect() as conn:
            return [r[0] for r in conn.execute(text("SELECT reason FROM dead_letters ORDER BY id"))]
    finally:
        eng.dispose()
