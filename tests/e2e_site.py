"""A site for end-to-end tests: the real service (broker link, writer, refits, the alert plug-in)
on a real Mosquitto, a webhook receiver on loopback, a sensor publishing over MQTT, and time
simulated with a ManualClock, so hours of a process play in seconds.

    with Site(broker, tmp_path, items_toml) as site:
        site.feed("brew/wort-7", curve, 0, 3600, every_s=30, refit_every_s=120)
        site.alerts()          # every alert the webhook received, in order
        site.forecast("wort-7")  # the item's newest published forecast JSON
"""

from __future__ import annotations

import json
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import paho.mqtt.client as mqtt
from test_hooks import Receiver
from thermeta.daemon.clock import ManualClock
from thermeta.daemon.config import load_config
from thermeta.daemon.service import Service

T0 = 1_800_000_000.0


def wait_for(cond: Callable[[], Any], timeout: float = 15.0) -> Any:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        got = cond()
        if got:
            return got
        time.sleep(0.02)
    return cond()


class Site:
    """The service on ``broker`` watching ``items`` (TOML ``[[item]]`` tables and any
    ``[[schedule]]``), with a webhook hook; times are seconds after :data:`T0`."""

    def __init__(self, broker: Any, tmp_path: Path, items: str, *, refit_every_s: float = 120):
        self.receiver = Receiver()
        self.path = tmp_path / "site.toml"
        self.db = tmp_path / "site.db"
        self.path.write_text(
            f'[broker]\nhost = "{broker.host}"\nport = {broker.port}\n'
            f'client_id = "thermeta-e2e-{tmp_path.name[-20:]}"\n\n'
            f'[storage]\nurl = "sqlite:///{self.db}"\nbatch_ms = 20\n\n'
            f"[fit]\nrefit_every = {refit_every_s:g}\n\n{items}\n"
            f'[[hook]]\nkind = "webhook"\nurl = "{self.receiver.url}"\n'
        )
        self.config = load_config(self.path)
        self.clock = ManualClock(T0)
        self.svc = Service(self.config, clock=self.clock)
        self.pub = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id=f"e2e-{id(self)}")
        self.pub.connect(broker.host, broker.port)
        self.pub.loop_start()
        self.broker = broker
        self.sent: dict[str, int] = {}

    def __enter__(self) -> Site:
        self.svc.start()
        assert wait_for(self.svc.link.connected.is_set)
        return self

    def __exit__(self, *exc: Any) -> None:
        self.close()

    def close(self) -> None:
        self.svc.stop()
        self.pub.loop_stop()
        self.pub.disconnect()
        self.receiver.close()

    def publish(self, topic: str, payload: str) -> None:
        self.pub.publish(topic, payload, qos=1).wait_for_publish(5)

    def feed(
        self,
        topic: str,
        item: str,
        curve: Callable[[float], float],
        t_from: float,
        t_to: float,
        *,
        every_s: float,
        refit_every_s: float,
        noise: float = 0.05,
        seed: int = 0,
        on_refit: Callable[[float], None] | None = None,
    ) -> None:
        """Readings of ``curve(t)`` (plus seeded noise) every ``every_s`` from ``t_from`` to
        ``t_to``, published over MQTT; the clock moves with them and a refit round runs every
        ``refit_every_s`` (then ``on_refit(t)``)."""
        rng = np.random.default_rng(seed)
        t = t_from
        while t <= t_to:
            chunk_end = min(t + refit_every_s, t_to + every_s)
            self.clock.set(T0 + chunk_end - every_s)
            while t < chunk_end:
                v = curve(t) + float(rng.normal(0.0, noise))
                self.publish(topic, json.dumps({"ts": T0 + t, "value": round(v, 2)}))
                self.sent[item] = self.sent.get(item, 0) + 1
                t += every_s
            n = self.sent[item]
            assert wait_for(lambda n=n: len(self.svc.store.recent_readings(item)) >= n)
            self.svc.refit_now()
            if on_refit is not None:
                on_refit(t - every_s)

    def alerts(self, wait: bool = True) -> list[dict[str, Any]]:
        if wait:
            wait_for(lambda: self.svc.alerts.astore.outbox_counts()["pending"] == 0)
            time.sleep(0.2)
        return [json.loads(b) for _, _, b in self.receiver.posts]

    def forecast(self, item: str) -> dict[str, Any]:
        return self.svc.refitter.previous[item]

    def retained(self, item: str) -> dict[str, Any] | None:
        """The retained forecast on the broker, read with the standard mosquitto_sub."""
        import subprocess

        r = subprocess.run(
            [
                "mosquitto_sub",
                "-h",
                self.broker.host,
                "-p",
                str(self.broker.port),
                "-t",
                f"thermeta/forecast/{item}",
                "-C",
                "1",
                "-W",
                "3",
            ],
            capture_output=True,
            text=True,
            timeout=15,
        )
        return json.loads(r.stdout) if r.stdout.strip() else None
