"""End to end through a real Mosquitto: readings of a load warming toward its limit go in over
MQTT, the daemon refits, the alert plug-in raises alerts, and a webhook on loopback receives them.

The load follows Newton's law of cooling (T = Ta + (T0 - Ta) e^(-k t), the published law; invented
demo numbers: a reefer trailer at -20 degC in 12 degC air, tau 10 h, limit -15 degC).  The exact
crossing time is t* = -ln((thr - Ta)/(T0 - Ta))/k.  After it, the compressor pulls the load back
down (ambient -30 degC, tau 1 h).  Time is simulated with a ManualClock; the daemon is the real
Service with its broker link, writer, refitter and the alert plug-in attached.
"""

from __future__ import annotations

import json
import math
import subprocess
import time

import numpy as np
import paho.mqtt.client as mqtt
from test_hooks import Receiver
from thermeta.daemon.clock import ManualClock
from thermeta.daemon.config import load_config
from thermeta.daemon.service import Service

T0 = 1_800_000_000.0
TA, T_LOAD, K = 12.0, -20.0, 1.0 / 36000.0
THR, LEAD = -15.0, 3600.0
T_CROSS = -math.log((THR - TA) / (T_LOAD - TA)) / K  # about 6116 s
T_COOL = T_CROSS + 1200.0  # the compressor comes back
STEP_S, DT_S = 300.0, 60.0


def truth(t_s: float) -> float:
    if t_s <= T_COOL:
        return TA + (T_LOAD - TA) * math.exp(-K * t_s)  # Newton, warming
    v_cool = TA + (T_LOAD - TA) * math.exp(-K * T_COOL)
    return -30.0 + (v_cool + 30.0) * math.exp(-(t_s - T_COOL) / 3600.0)  # Newton, pulled down


def wait_for(cond, timeout: float = 10.0) -> bool:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if cond():
            return True
        time.sleep(0.02)
    return cond()


def test_warming_load_warns_at_least_lead_before_crossing_once_then_crossed_then_recovered(
    broker, tmp_path
):
    """`approaching` arrives exactly once and at least `lead` (3600 s) before the true crossing,
    then `crossed`, then `recovered`, each posted to the webhook once."""
    receiver = Receiver()
    cfg_path = tmp_path / "thermeta.toml"
    cfg_path.write_text(f"""
[broker]
host = "127.0.0.1"
port = {broker.port}
client_id = "thermeta-e2e-alerts"

[storage]
url = "sqlite:///{tmp_path / "e2e.db"}"
batch_ms = 20

[fit]
refit_every = {STEP_S:g}

[[item]]
name = "trailer-4"
topic = "fleet/trailer-4/load"
threshold = {THR}
ambient = {TA}
lead = {LEAD:g}
remind_every = 100000

[[hook]]
kind = "webhook"
url = "{receiver.url}"

[[hook]]
kind = "mqtt"
events = ["approaching"]
""")
    cfg = load_config(cfg_path)
    clock = ManualClock(T0)
    svc = Service(cfg, clock=clock)
    rng = np.random.default_rng(7)
    pub = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id="e2e-sensor")
    pub.connect(broker.host, broker.port)
    pub.loop_start()
    sub = subprocess.Popen(
        [
            "mosquitto_sub",
            "-h",
            broker.host,
            "-p",
            str(broker.port),
            "-q",
            "1",
            "-t",
            "thermeta/alert/#",
            "-v",
            "-W",
            "60",
        ],
        stdout=subprocess.PIPE,
        text=True,
    )
    try:
        svc.start()
        assert wait_for(svc.link.connected.is_set)
        t_end = T_COOL + 2400.0
        n_sent = 0
        t = 0.0
        while t <= t_end:
            chunk_end = t + STEP_S
            while t < chunk_end:
                v = truth(t) + rng.normal(0, 0.05)
                info = pub.publish(
                    "fleet/trailer-4/load", json.dumps({"ts": T0 + t, "value": v}), qos=1
                )
                info.wait_for_publish(5)
                n_sent += 1
                t += DT_S
            clock.set(T0 + t - DT_S)
            assert wait_for(lambda n=n_sent: len(svc.store.recent_readings("trailer-4")) == n)
            svc.refit_now()
        assert wait_for(lambda: svc.alerts.astore.outbox_counts()["pending"] == 0)
        time.sleep(0.3)
    finally:
        sub.terminate()
        mqtt_lines = sub.communicate(timeout=10)[0].splitlines()
        svc.stop()
        pub.loop_stop()
        pub.disconnect()
        receiver.close()
    alerts = [json.loads(b) for _, _, b in receiver.posts]
    main = [a for a in alerts if a["event"] in ("approaching", "crossed", "recovered")]
    assert [a["event"] for a in main] == ["approaching", "crossed", "recovered"]
    approach, crossed, recovered = main
    assert T0 + T_CROSS - approach["at_s"] >= LEAD
    assert crossed["at_s"] >= T0 + T_CROSS - 2 * STEP_S  # noise 0.05 may show it a step early
    assert recovered["at_s"] > T0 + T_COOL
    assert "trailer-4 is approaching its limit of -15.0 °C" in approach["sentence"]
    assert len({a["id"] for a in alerts}) == len(alerts)  # each alert posted once
    # the mqtt hook, limited to `approaching`, published exactly that one alert
    assert len(mqtt_lines) == 1
    topic, payload = mqtt_lines[0].split(" ", 1)
    assert topic == "thermeta/alert/trailer-4"
    assert json.loads(payload)["id"] == approach["id"]
