"""Shared fixtures: a real Mosquitto broker on a free loopback port, and a PostgreSQL URL.

Broker tests skip with a clear reason when the ``mosquitto`` binary is missing on a developer's
machine, but with CI=true a missing broker fails the run instead of hiding the tests.
"""

from __future__ import annotations

import os
import shutil
import socket
import subprocess
import time
from dataclasses import dataclass
from pathlib import Path

import pytest

IN_CI = os.environ.get("CI", "").lower() in ("1", "true", "yes")


def free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _wait_port(port: int, timeout: float = 10.0) -> None:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        try:
            with socket.create_connection(("127.0.0.1", port), timeout=0.2):
                return
        except OSError:
            time.sleep(0.05)
    raise RuntimeError(f"broker did not open port {port} within {timeout} s")


@dataclass
class Broker:
    """A Mosquitto process of our own; ``restart()`` keeps its persistence file."""

    host: str
    port: int
    workdir: Path
    proc: subprocess.Popen | None = None

    @property
    def conf(self) -> Path:
        return self.workdir / "mosquitto.conf"

    def start(self) -> None:
        self.conf.write_text(
            f"listener {self.port} 127.0.0.1\n"
            "allow_anonymous true\n"
            "persistence true\n"
            f"persistence_location {self.workdir}/\n"
            "autosave_interval 1\n"
            "max_queued_messages 0\n"
            "max_inflight_messages 1000\n"
            f"log_dest file {self.workdir}/mosquitto.log\n"
            # As root, mosquitto drops to user `mosquitto`, which cannot write into pytest's
            # 0700 temp dirs: no persistence file, so a restart would lose every session.
            + ("user root\n" if os.geteuid() == 0 else "")
        )
        self.proc = subprocess.Popen(
            [shutil.which("mosquitto") or "mosquitto", "-c", str(self.conf)],
            stdout=subprocess.DEVNULL,
            stderr=subprocess.DEVNULL,
        )
        _wait_port(self.port)

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


def _need_mosquitto() -> None:
    if shutil.which("mosquitto") is None or shutil.which("mosquitto_pub") is None:
        msg = (
            "mosquitto / mosquitto-clients not installed "
            "(apt-get install mosquitto mosquitto-clients)"
        )
        if IN_CI:
            pytest.fail(f"CI=true but {msg}")
        pytest.skip(msg)


@pytest.fixture
def broker(tmp_path_factory) -> Broker:
    """A fresh Mosquitto on a free loopback port, persistence on, unlimited queue."""
    _need_mosquitto()
    b = Broker("127.0.0.1", free_port(), tmp_path_factory.mktemp("mosquitto"))
    b.start()
    yield b
    b.stop()


@pytest.fixture
def pg_url() -> str:
    """THERMETA_TEST_PG_URL (a SQLAlchemy URL); skipped when unset, failed in CI when unset."""
    url = os.environ.get("THERMETA_TEST_PG_URL")
    if not url:
        if IN_CI and os.environ.get("THERMETA_REQUIRE_PG"):
            pytest.fail("THERMETA_REQUIRE_PG set but THERMETA_TEST_PG_URL is empty")
        pytest.skip(
            "THERMETA_TEST_PG_URL not set (e.g. postgresql+psycopg://postgres@127.0.0.1/test)"
        )
    return url
