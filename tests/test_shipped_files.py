"""The files the README tells a user to install work as written.

- ``config/mosquitto.conf`` copied unchanged into a stock Mosquitto 2's ``conf.d``: the broker
  starts (the Debian/Ubuntu main file already sets ``persistence_location``, which may be given
  only once), lets a local client in without a password as the README's ``mosquitto_pub`` lines
  need, and keeps a QoS 1 reading queued for thermeta's persistent session across a restart.
- ``config/thermeta.service``: its commands find ``thermeta`` on the unit's own PATH (a venv's,
  pip's ``--user`` place or ``/usr/local/bin``), and ``systemd-analyze verify`` accepts it.
"""

from __future__ import annotations

import os
import re
import shutil
import subprocess
import sys
import time
from pathlib import Path

import paho.mqtt.client as mqtt
import pytest
from conftest import free_port
from thermeta.daemon.testing import wait_port

ROOT = Path(__file__).resolve().parents[1]


def _stock_broker(tmp_path: Path, port: int) -> subprocess.Popen:
    """Mosquitto with a main file like the Debian package's and the shipped file in conf.d;
    ``-p`` moves the local-only listener off 1883 for the test."""
    if shutil.which("mosquitto") is None:
        pytest.skip("mosquitto is not installed (apt-get install mosquitto)")
    conf_d = tmp_path / "conf.d"
    conf_d.mkdir(exist_ok=True)
    shutil.copy(ROOT / "config" / "mosquitto.conf", conf_d / "thermeta.conf")
    main = tmp_path / "mosquitto.conf"
    main.write_text(
        # /etc/mosquitto/mosquitto.conf of the Debian package, with the test's folders
        f"persistence true\npersistence_location {tmp_path}/\n"
        f"log_dest file {tmp_path}/mosquitto.log\ninclude_dir {conf_d}\n"
        + ("user root\n" if os.geteuid() == 0 else "")
    )
    proc = subprocess.Popen(
        [shutil.which("mosquitto") or "mosquitto", "-c", str(main), "-p", str(port)],
        stdout=subprocess.DEVNULL,
        stderr=subprocess.DEVNULL,
    )
    try:
        wait_port(port, "127.0.0.1")
    except TimeoutError:
        proc.kill()
        raise AssertionError((tmp_path / "mosquitto.log").read_text()) from None
    return proc


def _session(port: int, got: list[bytes]) -> mqtt.Client:
    c = mqtt.Client(
        mqtt.CallbackAPIVersion.VERSION2, client_id="thermeta-shipped-test", clean_session=False
    )
    c.on_message = lambda _c, _u, m: got.append(m.payload)
    c.connect("127.0.0.1", port)
    c.loop_start()
    return c


def test_the_shipped_mosquitto_conf_starts_a_stock_broker_and_keeps_the_session(tmp_path):
    port = free_port()
    broker = _stock_broker(tmp_path, port)
    try:
        got: list[bytes] = []
        c = _session(port, got)
        c.subscribe("yard/reefer-07/load", qos=1)
        time.sleep(0.3)
        c.disconnect()
        c.loop_stop()
        pub = subprocess.run(  # the README's own line, anonymous on loopback
            ["mosquitto_pub", "-p", str(port), "-q", "1", "-t", "yard/reefer-07/load", "-m", "4.3"],
            capture_output=True,
            text=True,
            timeout=10,
        )
        assert pub.returncode == 0, pub.stderr
        broker.terminate()  # a clean stop writes the persistence file
        broker.wait(10)
        broker = _stock_broker(tmp_path, port)
        c = _session(port, got)
        deadline = time.monotonic() + 5
        while not got and time.monotonic() < deadline:
            time.sleep(0.05)
        c.disconnect()
        c.loop_stop()
        assert got == [b"4.3"]  # queued while away, kept across the broker's restart
    finally:
        broker.terminate()
        broker.wait(10)


def _unit() -> str:
    return (ROOT / "config" / "thermeta.service").read_text()


def test_the_systemd_unit_finds_thermeta_on_its_own_path(tmp_path):
    """ExecStartPre and ExecStart go through /usr/bin/env with the unit's PATH: run with that
    PATH plus the folder pip put this install's ``thermeta`` in, they check a config."""
    unit = _unit()
    path = re.search(r"^Environment=PATH=(\S+)$", unit, re.M)
    assert path is not None
    dirs = path.group(1).split(":")
    assert {"/usr/local/bin", "/usr/bin"} <= set(dirs) and "/var/lib/thermeta/.local/bin" in dirs
    pre = re.search(r"^ExecStartPre=(.+)$", unit, re.M)
    start = re.search(r"^ExecStart=(.+)$", unit, re.M)
    assert pre and start
    assert start.group(1).startswith("/usr/bin/env thermeta run --config ")
    cfg = tmp_path / "thermeta.toml"
    cfg.write_text('[[item]]\nname = "reefer-07"\ntopic = "yard/reefer-07/load"\nthreshold = 8.0\n')
    beside = Path(sys.executable).parent / "thermeta"  # where pip put it for this Python
    here = str(beside) if beside.exists() else shutil.which("thermeta")
    if here is None:
        pytest.skip("thermeta is not installed as a command (pip install -e .)")
    argv = pre.group(1).replace("/etc/thermeta/thermeta.toml", str(cfg)).split()
    env = {"PATH": f"{Path(here).parent}:{path.group(1)}"}
    r = subprocess.run(argv, env=env, capture_output=True, text=True, timeout=60)
    assert r.returncode == 0, r.stderr


def test_systemd_accepts_the_unit(tmp_path):
    if shutil.which("systemd-analyze") is None:
        pytest.skip("systemd-analyze is not installed")
    unit = tmp_path / "thermeta.service"
    unit.write_text(_unit())
    r = subprocess.run(
        ["systemd-analyze", "verify", "--man=no", str(unit)],
        capture_output=True,
        text=True,
        timeout=60,
    )
    problems = [
        ln
        for ln in (r.stdout + r.stderr).splitlines()
        if "thermeta.service" in ln and "Unknown user" not in ln and "Unknown group" not in ln
    ]
    assert not problems, r.stdout + r.stderr
