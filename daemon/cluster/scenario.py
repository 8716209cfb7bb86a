"""An invented yard for cluster tests and ``scripts/bench_cluster.py``: ``n`` probes reporting
live over MQTT, every tenth warming past its limit.

The readings follow Newton's law of cooling (T = Ta + (T0 - Ta) e^(-t/tau)): every tenth item
warms from 4 toward 20 degC and passes its 8 degC limit about 86 s into its readings; the others
cool slowly from 6 toward 2 degC, far from the limit.  Every reading carries a fixed
pseudo-random scatter of +-0.05 degC.  Invented numbers, for the plumbing, not the physics.
"""

from __future__ import annotations

import json
import math
import threading
import time
from typing import Any

STEP_S = 5.0  # seconds between an item's readings
TA, T0, TAU, THR = 20.0, 4.0, 300.0, 8.0

ITEMS = f"""
[[item]]
name = "{{2}}"
topic = "yard/+/load"
threshold = {THR}
side = "above"
ambient = {TA}
lead = 60
remind_every = 100000

[[item]]
name = "c{{2}}"
topic = "yard/+/chill"
threshold = {THR}
side = "above"
lead = 60
remind_every = 100000
"""


def topic(i: int) -> str:
    return f"yard/{i:04d}/{'load' if i % 10 == 0 else 'chill'}"


def item_name(i: int) -> str:
    return f"{i:04d}" if i % 10 == 0 else f"c{i:04d}"


def value(i: int, t_s: float) -> float:
    """Item ``i``'s reading ``t_s`` seconds into its record (degC)."""
    scatter = 0.05 * math.sin(12.9898 * i + 78.233 * t_s)
    if i % 10 == 0:
        return round(TA + (T0 - TA) * math.exp(-t_s / TAU) + scatter, 3)
    return round(2.0 + 4.0 * math.exp(-t_s / (3000.0 + 40 * (i % 50))) + scatter, 3)


class Stream(threading.Thread):
    """Round j: one reading of every item (ts = start + j * STEP_S), published at QoS 1 and
    acknowledged by the broker before the next round (a client holds at most 65,535
    unacknowledged messages): the first ``history`` rounds at once, then one every STEP_S (the
    readings' time stamps keep up with the clock), until ``stop`` is set."""

    def __init__(self, broker: Any, n_items: int, history: int, client_id: str = "yard-stream"):
        super().__init__(daemon=True)
        self.broker, self.n_items, self.history = broker, n_items, history
        self.client_id = client_id
        self.t_start = time.time() - history * STEP_S
        self.rounds = 0
        self.stop = threading.Event()

    def run(self) -> None:
        import paho.mqtt.client as mqtt

        c = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id=self.client_id)
        c.connect(self.broker.host, self.broker.port)
        c.loop_start()
        try:
            while not self.stop.is_set():
                j = self.rounds
                infos = [
                    c.publish(
                        topic(i),
                        json.dumps(
                            {"ts": self.t_start + j * STEP_S, "value": value(i, j * STEP_S)}
                        ),
                        qos=1,
                    )
                    for i in range(self.n_items)
                ]
                for info in infos:
                    info.wait_for_publish(30)
                self.rounds = j + 1
                if j >= self.history:
                    self.stop.wait(self.t_start + (j + 1) * STEP_S - time.time())
        finally:
            c.disconnect()
            c.loop_stop()
