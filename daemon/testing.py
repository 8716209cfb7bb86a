"""Helpers for tests and benches, ours and users': a real Mosquitto of one's own.

    with Mosquitto(workdir) as broker:       # a free loopback port, a config file in workdir
        publish_to(broker.host, broker.port)
        broker.restart()                      # same port; sessions and queued messages kept

The broker keeps what a durable subscriber needs (``persistence true``, no limit on queued
messages) and never touches a broker already running on 1883.  It needs the ``mosquitto`` binary
(Debian: ``apt-get install mosquitto``).
"""

from __future__ import annotations

import os
import shutil
import socket
import subprocess
import time
from dataclasses import dataclass, field
from pathlib import Path
from types import TracebackType


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
