"""The simulator: its payloads parse to the scenario's readings, it publishes them through a real
broker in sped-up time, and the config it writes is one the daemon accepts."""

from __future__ import annotations

import json
import shutil
import socket
import subprocess
import sys
import time

import numpy as np
import pytest
from thermeta.daemon.clock import ScaledClock
from thermeta.daemon.config import load_config
from thermeta.daemon.ingest.payloads import parse_payload
from thermeta.daemon.simulation import scenarios as S
from thermeta.daemon.simulation import simulator as sim


def _parse_all(msgs, now):
    got: dict[str, list[tuple[float, float]]] = {}
    for m in msgs:
        for r in parse_payload(m.payload, now=now):
            assert not r.receipt_ts
            got.setdefault(m.topic, []).append((r.ts, r.value_c))
    return got


def test_every_payload_parses_back_to_the_scenario_readings():
    """Each JSON, RFC 3339 JSON and SenML payload (RFC 8428) of all six sites parses with the
    daemon's payload reader into exactly the scenario's readings (1 ms, 0.005 degC)."""
    sc = S.build("all", seed=5)
    msgs = sim.messages(sc)
    forms = {p.spec.form for p in sc.probes}
    assert forms == {"json", "json-rfc3339", "senml"}
    assert any(m.n_readings > 1 for m in msgs)  # batched SenML packs are in use
    got = _parse_all(msgs, now=sc.t_start + sc.duration_s + 60)
    assert sum(len(v) for v in got.values()) == sc.n_readings()
    for p in sc.probes:
        ts, vs = np.array(got[p.spec.topic]).T
        order = np.argsort(ts, kind="stable")
        assert np.allclose(ts[order], p.t, atol=1e-3)
        assert np.allclose(vs[order], p.y, atol=5e-3)


def test_messages_fall_due_in_order_and_never_before_their_readings():
    """Payloads are sorted by due time and a pack is never due before its newest reading."""
    sc = S.build("frozen-trailer")
    msgs = sim.messages(sc)
    due = np.array([m.due_t for m in msgs])
    assert np.all(np.diff(due) >= 0)
    for m in msgs[:50]:
        newest = max(r.ts for r in parse_payload(m.payload, now=m.due_t))
        assert m.due_t == pytest.approx(newest, abs=1e-3)


def test_config_text_is_accepted_by_the_daemon_config(tmp_path):
    """The written config loads with the daemon's validator; one item per load probe, with the
    site's ambient probe as ambient_topic, the model and lead carried over."""
    sc = S.build("all")
    path = tmp_path / "sim.toml"
    path.write_text(
        sim.config_text(sc, host="127.0.0.1", port=1883, storage_url=f"sqlite:///{tmp_path}/t.db")
    )
    cfg = load_config(path)
    assert [i.name for i in cfg.items] == [p.name for p in sc.loads]
    by = {i.name: i for i in cfg.items}
    large = by["route9/trailer-4/carton-large"]
    assert large.model == "slab" and large.ambient_topic == "route9/trailer-4/air"
    assert large.threshold == -15.0 and large.lead_s == 7200
    assert by["copperbeck/brewhouse/batch-0417/wort"].ambient == 9.0
    assert [h.kind for h in cfg.hooks] == ["mqtt"]


def test_publishes_through_a_real_broker_at_speed(broker):
    """At 3000x the wort scenario's first 20 simulated minutes go out over a real Mosquitto; the
    standard mosquitto_sub client receives exactly those payloads, in order per topic."""
    sc = S.build("wort-chill", seed=2, duration_s=1200.0)
    out = subprocess.Popen(
        [
            shutil.which("mosquitto_sub"),
            "-h",
            broker.host,
            "-p",
            str(broker.port),
            "-t",
            "#",
            "-v",
            "-q",
            "1",
        ],
        stdout=subprocess.PIPE,
        text=True,
    )
    try:
        time.sleep(0.5)
        clock = ScaledClock(sc.t_start, 3000.0)
        s = sim.Simulator(sc, broker.host, broker.port, clock)
        t0 = time.monotonic()
        stats = s.run()
        wall = time.monotonic() - t0
        time.sleep(0.5)
    finally:
        out.terminate()
        text, _ = out.communicate(timeout=5)
    assert stats.error is None and stats.finished
    assert stats.readings == sc.n_readings()
    assert 0.3 < wall < 5.0  # paced: 1200 s at 3000x is 0.4 s, not instant, not stuck
    lines = [ln.split(" ", 1) for ln in text.splitlines() if ln.strip()]
    assert len(lines) == len(sim.messages(sc))
    wort = [json.loads(p)["value"] for t, p in lines if t.endswith("/wort")]
    assert wort == [round(v, 2) for v in sc.probe("copperbeck/brewhouse/batch-0417/wort").y]


def test_cli_print_config_and_bad_arguments(tmp_path):
    """`thermeta simulate --print-config` prints a loadable config and the truth; a bad speed is
    exit 2, an unreachable broker exit 1 with one line saying so."""
    run = [sys.executable, "-m", "thermeta.daemon.cli", "simulate"]
    ok = subprocess.run(
        run + ["--scenario", "wort-chill", "--print-config"],
        capture_output=True,
        text=True,
        timeout=60,
    )
    assert ok.returncode == 0
    assert "crosses 20 °C" in ok.stdout
    (tmp_path / "c.toml").write_text(ok.stdout)
    assert load_config(tmp_path / "c.toml").items[0].name.endswith("/wort")
    bad = subprocess.run(run + ["--speed", "0"], capture_output=True, text=True, timeout=60)
    assert bad.returncode == 2 and "--speed" in bad.stderr
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        port = sock.getsockname()[1]
    down = subprocess.run(
        run + ["--port", str(port), "--quiet"], capture_output=True, text=True, timeout=60
    )
    assert down.returncode == 1
    assert "no MQTT broker answered" in down.stderr
