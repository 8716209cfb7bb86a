"""Faults 16-20 of the injection campaign: answers and messages that were wrong or missing.
(Faults 14 and 15 are pinned in tests/test_one_truth.py.)"""

from __future__ import annotations

import json
import socket
import subprocess
import sys
import time

import pytest
from conftest import IN_CI
from thermeta.daemon.testing import (
    RunningDaemon,
    count_readings,
    publish,
    readings,
    wait_for,
    write_config,
)

CELLAR = '[[item]]\nname = "{2}"\ntopic = "cellar/+/core"\nthreshold = 8.0\nambient = 20.0\n'


def _retained(broker, topic: str) -> dict | None:
    r = subprocess.run(
        ["mosquitto_sub", "-h", broker.host, "-p", str(broker.port), "-t", topic, "-C", "1"]
        + ["-W", "2"],
        capture_output=True,
        text=True,
    )
    return json.loads(r.stdout) if r.returncode == 0 and r.stdout.strip() else None


@pytest.mark.broker
def test_fault16_a_second_daemon_on_the_same_store_refuses_to_start(broker, tmp_path):
    """Started twice with one config, the two flapped (each kicking the other off the broker)
    with no hint.  The second now refuses with a clear message and exit code 1, and the first
    goes on storing readings; each instance's status is retained on its own topic."""
    url = f"sqlite:///{tmp_path / 'store.db'}"
    cfg = write_config(tmp_path, broker, db_url=url, items=CELLAR, refit_every=60)
    t0 = time.time() - 600
    with RunningDaemon(cfg) as first:
        time.sleep(1.0)  # its first heartbeat is in the store
        second = subprocess.run(
            [sys.executable, "-m", "thermeta.daemon.cli", "run", "--config", str(cfg)],
            capture_output=True,
            text=True,
            timeout=60,
            cwd=tmp_path,
        )
        assert second.returncode == 1, second.stderr[-2000:]
        assert "already running" in second.stderr, second.stderr[-2000:]
        assert str(first.proc.pid) in second.stderr
        publish(broker, readings("cellar/tank-1/core", t0, 10))
        wait_for(lambda: count_readings(url, "tank-1") == 10, 10, first.log)
        status = _retained(broker, "thermeta/status/thermeta-test")
        assert status and status["state"] == "online"
        assert "took over" not in first.text() and "refused" not in first.text()
    assert _retained(broker, "thermeta/status/thermeta-test")["state"] == "offline"


@pytest.mark.broker
def test_fault16_a_kill_9_does_not_block_the_next_start(broker, tmp_path):
    """The check reads the last heartbeat's process: one that is gone does not count."""
    url = f"sqlite:///{tmp_path / 'store.db'}"
    cfg = write_config(tmp_path, broker, db_url=url, items=CELLAR, refit_every=60)
    d = RunningDaemon(cfg).start()
    time.sleep(1.0)
    d.kill9()
    with RunningDaemon(cfg) as again:
        publish(broker, readings("cellar/tank-1/core", time.time() - 600, 3))
        wait_for(lambda: count_readings(url, "tank-1") == 3, 10, again.log)


@pytest.mark.broker
def test_fault16_a_second_daemon_with_the_same_client_id_refuses_to_start(broker, tmp_path):
    """Two stores, one client id: each connect threw the other off the broker (Mosquitto closes
    the older connection without a reason) and both only warned.  The second now reads the
    first's retained status with a client of its own before connecting, and refuses with exit
    code 1, naming the first's pid and host; the first keeps its one connection."""
    a, b = tmp_path / "a", tmp_path / "b"
    a.mkdir()
    b.mkdir()
    cfg_a = write_config(a, broker, items=CELLAR, refit_every=60)
    cfg_b = write_config(b, broker, items=CELLAR, refit_every=60)
    with RunningDaemon(cfg_a) as first:
        try:
            second = subprocess.run(
                [sys.executable, "-m", "thermeta.daemon.cli", "run", "--config", str(cfg_b)],
                capture_output=True,
                text=True,
                timeout=15,
                cwd=b,
            )
        except subprocess.TimeoutExpired as exc:
            pytest.fail(f"the second daemon did not refuse: {exc.stderr!r}"[-2000:])
        assert second.returncode == 1, second.stderr[-2000:]
        said = [ln for ln in second.stderr.splitlines() if "already running" in ln]
        assert len(said) == 1, second.stderr[-2000:]
        assert "with client id thermeta-test" in said[0]
        assert f"pid {first.proc.pid} on host {socket.gethostname()}" in said[0]
        assert "give this one its own [broker] client_id" in said[0]
        publish(broker, readings("cellar/tank-1/core", time.time() - 600, 5))
        url_a = f"sqlite:///{a / 'store.db'}"
        wait_for(lambda: count_readings(url_a, "tank-1") == 5, 10, first.log)
        text = first.text()
    assert text.count("connected to ") == 1, text[-3000:]
    assert "took over" not in text, text[-3000:]


@pytest.mark.parametrize("text", ["1_0", "４２", "٤٢", " 4\u00a0", "0x10", "4.", "-.5e1x"])
def test_fault17_a_bare_number_payload_is_ascii_decimal_only(text):
    """Python's float() takes `1_0` (10.0) and other scripts' digits (42.0); a bare payload is
    a decimal number in ASCII (as JSON's numbers are) or a dead letter."""
    from thermeta.daemon.ingest.payloads import parse_payload
    from thermeta.storage.errors import PayloadError

    if text == "4.":  # a trailing point is still a plain decimal number
        assert parse_payload(text.encode(), time.time())[0].value_c == 4.0
        return
    with pytest.raises(PayloadError, match="number"):
        parse_payload(text.encode(), time.time())


def test_fault17_plain_bare_numbers_still_pass():
    from thermeta.daemon.ingest.payloads import parse_payload

    for text, want in (("4", 4.0), ("-3.25", -3.25), ("+1e1", 10.0), (" 7.5\n", 7.5), (".5", 0.5)):
        assert parse_payload(text.encode(), time.time())[0].value_c == want


def _forecast_csv(tmp_path, body: str):
    path = tmp_path / "probe.csv"
    path.write_text(body)
    return subprocess.run(
        [sys.executable, "-m", "thermeta.daemon.cli", "forecast", str(path), "--threshold", "8"]
        + ["--ambient", "20"],
        capture_output=True,
        text=True,
    )


def test_fault18_a_decimal_comma_csv_is_refused_naming_the_line(tmp_path):
    """`2026-12-01T08:00:00Z,3,1` under a `time,value` header was read as 3: a row with more
    fields than the header is refused with its line and the likely cause."""
    rows = "".join(f"2026-12-01T08:{m:02d}:00Z,{3 + m // 10},{m % 10}\n" for m in range(0, 40, 5))
    out = _forecast_csv(tmp_path, "time,value\n" + rows)
    assert out.returncode == 2, out.stdout + out.stderr
    assert "probe.csv:2:" in out.stderr and "decimal comma" in out.stderr, out.stderr


def test_fault18_blank_values_are_counted_in_a_warning(tmp_path):
    """A blank value was dropped without a word: the forecast goes on, and says how many lines
    it skipped and where the first was."""
    rows = [f"2026-12-01T08:{m:02d}:00Z,{4 + 0.1 * m:.2f}" for m in range(0, 40, 2)]
    rows[3] = rows[3].split(",")[0] + ","
    rows[7] = rows[7].split(",")[0] + ","
    out = _forecast_csv(tmp_path, "time,value\n" + "\n".join(rows) + "\n")
    assert out.returncode == 0, out.stderr
    assert "2 line(s)" in out.stderr and "probe.csv:5" in out.stderr, out.stderr


@pytest.mark.broker
def test_fault20_a_broker_restart_logs_no_error_and_nothing_before_it_is_true(broker, tmp_path):
    """Each reconnect logged `ERROR ... Client is not connected` (paho's last loop), and the
    start said "watching N topic filter(s)" with no broker there.  Now: started with the broker
    down, the daemon says it is watching only once subscribed; a broker restart logs no ERROR;
    readings still arrive exactly once."""

    url = f"sqlite:///{tmp_path / 'store.db'}"
    cfg = write_config(tmp_path, broker, db_url=url, items=CELLAR, refit_every=60)
    broker.stop()
    d = RunningDaemon(cfg, wait_connected=False).start()
    try:
        wait_for(lambda: "cannot reach broker" in d.text(), 15, d.log)
        assert "watching" not in d.text()
        broker.start()
        wait_for(lambda: "connected to" in d.text() and "watching 1" in d.text(), 20, d.log)
        assert d.text().index("watching 1") > d.text().index("connected to")
        mark = len(d.text())
        broker.restart()
        wait_for(lambda: d.text().count("connected to") >= 2, 20, d.log)
        t0 = time.time() - 600
        publish(broker, readings("cellar/tank-1/core", t0, 10))
        wait_for(lambda: count_readings(url, "tank-1") == 10, 10, d.log)
        after = d.text()[mark:]
    finally:
        d.stop()
    assert " ERROR " not in after and "not connected" not in after, after


@pytest.fixture
def tls_broker(tmp_path):
    """A Mosquitto TLS listener (server certificate for 127.0.0.1, client certificates
    required) with certificates from one CA, and a second CA with its own client certificate."""
    import os
    import shutil

    from test_daemon_broker import _make_certs
    from thermeta.daemon.testing import free_port, wait_port

    if shutil.which("openssl") is None or shutil.which("mosquitto") is None:
        if IN_CI:
            pytest.fail("CI=true but openssl or mosquitto is missing")
        pytest.skip("openssl and mosquitto are needed")
    good, other = tmp_path / "good", tmp_path / "other"
    for d in (good, other):
        d.mkdir()
        _make_certs(d)
    port = free_port()
    conf = tmp_path / "m.conf"
    conf.write_text(
        f"listener {port} 127.0.0.1\nallow_anonymous true\ncafile {good / 'ca.pem'}\n"
        f"certfile {good / 'server.pem'}\nkeyfile {good / 'server.key'}\n"
        "require_certificate true\n" + ("user root\n" if os.geteuid() == 0 else "")
    )
    mq = subprocess.Popen(["mosquitto", "-c", str(conf)], stderr=subprocess.DEVNULL)
    wait_port(port)
    yield port, good, other
    mq.terminate()
    mq.wait(10)


@pytest.mark.broker
@pytest.mark.parametrize(
    "case, said",
    [
        ("wrong CA", "certificate is not trusted"),
        ("wrong host name", "certificate is not trusted"),
        ("wrong client certificate", "refused our client certificate"),
    ],
)
def test_fault19_a_tls_failure_says_which_certificate(tls_broker, tmp_path, case, said):
    """A wrong CA or host name was only "cannot reach broker; retrying", a refused client
    certificate "broker did not accept MQTT 5": each now says the certificate problem."""
    port, good, other = tls_broker
    ca, host, client = good, "127.0.0.1", good
    if case == "wrong CA":
        ca = other
    elif case == "wrong host name":
        host = "localhost"  # the server's certificate names 127.0.0.1 only
    else:
        client = other
    cfg = tmp_path / "tls.toml"
    cfg.write_text(
        f'[broker]\nhost = "{host}"\nport = {port}\nclient_id = "tls-fault"\n'
        f'ca_file = "{ca / "ca.pem"}"\ncert_file = "{client / "client.pem"}"\n'
        f'key_file = "{client / "client.key"}"\n\n'
        f'[storage]\nurl = "sqlite:///{tmp_path / "store.db"}"\n\n' + CELLAR
    )
    with RunningDaemon(cfg, wait_connected=False) as d:
        wait_for(lambda: "TLS with broker" in d.text(), 20, d.log)
        time.sleep(1.0)
        text = d.text()
    assert said in text, text
    assert "did not accept MQTT 5" not in text
    assert text.count("TLS with broker") == 1, text
