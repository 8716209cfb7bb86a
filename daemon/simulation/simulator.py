"""Publish a scenario's readings over MQTT in real or sped-up time, and the config to watch them.

The readings come from :mod:`thermeta.daemon.simulation.scenarios` (physics with known truth).  Each
reading is published when the clock passes its timestamp (a logger sending a SenML pack of several
readings publishes when the newest is due), QoS 1, on one topic per probe.  Payload forms in use:

    json           {"ts": 1764600030.0, "value": 2.3, "unit": "C"}
    json-rfc3339   {"ts": "2025-12-01T14:40:30Z", "value": 2.3}
    senml          [{"bn": "eastpier/reefer-12/air", "bt": 1764600030.0, "u": "Cel", "v": 2.3},
                    {"t": 60.0, "u": "Cel", "v": 2.4}]        (RFC 8428)

The clock is injected: the demo hands the same ScaledClock to this publisher and to the service,
so timestamps, refits and countdowns agree at any speed.
"""

from __future__ import annotations

import json
import threading
from dataclasses import dataclass
from typing import Protocol

from thermeta.daemon.simulation.scenarios import Scenario
from thermeta.daemon.simulation.sites import PayloadForm
from thermeta.predictors.result import rfc3339

MAX_PENDING = 2000  # unacknowledged QoS 1 publishes before we wait (paho's ids wrap at 65,535)


class Clock(Protocol):
    rate: float

    def now(self) -> float: ...


@dataclass(frozen=True)
class Message:
    due_t: float  # epoch s when it may be sent (its newest reading's time)
    topic: str
    payload: bytes
    n_readings: int


def _round(v: float) -> float:
    # the probes send tenths; keep the JSON free of binary-float noise such as 2.3000000000000003
    return round(float(v), 2)


def encode(form: PayloadForm, name: str, ts: list[float], values: list[float]) -> bytes:
    """One payload carrying the readings ``(ts, values)`` of probe ``name`` in ``form``."""
    if form == "senml":
        recs: list[dict] = []
        for i, (t, v) in enumerate(zip(ts, values)):
            rec: dict = {"bn": name, "bt": round(t, 3)} if i == 0 else {"t": round(t - ts[0], 3)}
            rec.update(u="Cel", v=_round(v))
            recs.append(rec)
        return json.dumps(recs, separators=(",", ":")).encode()
    if len(ts) != 1:
        raise ValueError(f"form {form!r} carries one reading per payload")
    if form == "json":
        doc: dict = {"ts": round(ts[0], 3), "value": _round(values[0]), "unit": "C"}
    elif form == "json-rfc3339":
        doc = {"ts": rfc3339(round(ts[0], 3)), "value": _round(values[0])}
    else:
        raise ValueError(f"unknown payload form {form!r}")
    return json.dumps(doc, separators=(",", ":")).encode()


def messages(scenario: Scenario) -> list[Message]:
    """Every payload of the scenario, in the order they fall due."""
    out: list[Message] = []
    for p in scenario.probes:
        spec = p.spec
        step = max(1, spec.batch if spec.form == "senml" else 1)
        t, y = p.t.tolist(), p.y.tolist()
        for lo in range(0, len(t), step):
            ts, vs = t[lo : lo + step], y[lo : lo + step]
            out.append(Message(max(ts), spec.topic, encode(spec.form, spec.name, ts, vs), len(ts)))
    out.sort(key=lambda m: m.due_t)
    return out


@dataclass
class SimStats:
    published: int = 0
    readings: int = 0
    total: int = 0
    last_due_t: float | None = None
    finished: bool = False
    error: str | None = None


class Simulator:
    """Publishes a scenario to a broker, paced by ``clock``; :meth:`run` blocks, :meth:`start`
    runs it in a thread, :meth:`stop` ends it early."""

    def __init__(
        self,
        scenario: Scenario,
        host: str,
        port: int,
        clock: Clock,
        *,
        client_id: str | None = None,
        qos: int = 1,
        connect_timeout_s: float = 10.0,
    ):
        if qos not in (0, 1):
            raise ValueError(f"qos must be 0 or 1, got {qos!r}")
        self.scenario = scenario
        self.host, self.port, self.clock, self.qos = host, port, clock, qos
        self.client_id = client_id or f"thermeta-sim-{threading.get_ident() % 100000}"
        self.connect_timeout_s = connect_timeout_s
        self.stats = SimStats()
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None
        self._connected = threading.Event()

    def _client(self):
        import paho.mqtt.client as mqtt

        c = mqtt.Client(
            mqtt.CallbackAPIVersion.VERSION2,
            client_id=self.client_id,
            protocol=mqtt.MQTTv311,
            clean_session=True,
        )

        def on_connect(client, userdata, flags, reason_code, properties):
            if not reason_code.is_failure:
                self._connected.set()

        def on_disconnect(client, userdata, flags, reason_code, properties):
            self._connected.clear()

        c.on_connect = on_connect
        c.on_disconnect = on_disconnect
        c.max_inflight_messages_set(100)
        c.reconnect_delay_set(0.2, 5)
        return c

    def run(self) -> SimStats:
        """Publish until the scenario ends or :meth:`stop` is called."""
        msgs = messages(self.scenario)
        self.stats.total = len(msgs)
        from thermeta.daemon.simulation.broker import broker_reachable

        if not broker_reachable(self.host, self.port, timeout_s=2.0):
            self.stats.error = f"no MQTT broker answered at {self.host}:{self.port}"
            return self.stats
        client = self._client()
        try:
            client.connect_async(self.host, self.port, keepalive=30)
            client.loop_start()
            if not self._connected.wait(self.connect_timeout_s):
                raise ConnectionError(f"no MQTT broker answered at {self.host}:{self.port}")
            pending = []
            for m in msgs:
                while not self._stop.is_set():
                    ahead_s = m.due_t - self.clock.now()
                    if ahead_s <= 0:
                        break
                    self._stop.wait(min(ahead_s / self.clock.rate, 0.25))
                if self._stop.is_set():
                    break
                info = client.publish(m.topic, m.payload, qos=self.qos)
                pending.append(info)
                self.stats.published += 1
                self.stats.readings += m.n_readings
                self.stats.last_due_t = m.due_t
                if len(pending) >= MAX_PENDING:
                    # pace: let the broker acknowledge the older half before queueing more
                    for old in pending[: MAX_PENDING // 2]:
                        old.wait_for_publish(timeout=10)
                    pending = pending[MAX_PENDING // 2 :]
            for info in pending:
                if self._stop.is_set():
                    break
                info.wait_for_publish(timeout=10)
            self.stats.finished = not self._stop.is_set()
        except (ConnectionError, OSError, RuntimeError, ValueError) as exc:
            self.stats.error = str(exc)
        finally:
            client.disconnect()
            client.loop_stop()
        return self.stats

    def start(self) -> Simulator:
        self._thread = threading.Thread(target=self.run, name="thermeta-simulator", daemon=True)
        self._thread.start()
        return self

    def stop(self, timeout_s: float = 10.0) -> None:
        self._stop.set()
        if self._thread is not None:
            self._thread.join(timeout_s)
            self._thread = None

    def wait(self, timeout_s: float | None = None) -> bool:
        """Block until the run ends; True if it did."""
        if self._thread is None:
            return True
        self._thread.join(timeout_s)
        return not self._thread.is_alive()


def _toml_str(s: str) -> str:
    return json.dumps(s)  # a JSON string of printable text is a valid TOML basic string


def config_text(
    scenario: Scenario,
    *,
    host: str,
    port: int,
    storage_url: str,
    refit_every_s: float = 60.0,
    client_id: str = "thermeta-demo",
    mqtt_alerts: bool = True,
) -> str:
    """A thermeta config (TOML) that watches every load probe of ``scenario``."""
    lines = [
        f"# Written by thermeta for the simulated scenario {scenario.name!r} ({scenario.title}).",
        "# Invented sites and simulated readings; thresholds and leads are examples, not advice.",
        "",
        "[broker]",
        f"host = {_toml_str(host)}",
        f"port = {int(port)}",
        f"client_id = {_toml_str(client_id)}",
        "",
        "[storage]",
        f"url = {_toml_str(storage_url)}",
        "",
        "[fit]",
        f"refit_every = {refit_every_s:g}",
        "window = 7200",
        "",
    ]
    for p in scenario.loads:
        s = p.spec
        site = s.name.rsplit("/", 1)[0]
        lines += ["[[item]]", f"name = {_toml_str(s.name)}", f"topic = {_toml_str(s.topic)}"]
        if s.schedule:
            lines.append(f"schedule = {_toml_str(s.schedule)}")  # its stages are targets
        else:
            lines += [
                f"threshold = {s.threshold:g}",
                f'kind = "{s.kind}"',
                # the side that counts: a rising load must stay below (past when above), a
                # cooling batch gets below its target
                f'side = "{"above" if s.direction == "rising" else "below"}"',
            ]
            if s.within_s:
                lines.append(f"within = {s.within_s:g}")
            if s.budget_s:
                lines.append(f"budget = {s.budget_s:g}")
            if s.start is not None:
                lines.append(f"start = {s.start:g}")
        if s.ambient_known is not None:
            lines.append(f"ambient = {s.ambient_known:g}")
        elif s.ambient_probe:
            lines.append(f"ambient_topic = {_toml_str(scenario.probe(s.ambient_probe).spec.topic)}")
        if s.model != "lumped":
            lines.append(f"model = {_toml_str(s.model)}")
        if s.window_s:
            lines.append(f"window = {s.window_s:g}")
        if s.lead_s:
            lines.append(f"lead = {s.lead_s:g}")
        lines += [f"site = {_toml_str(site)}", ""]
    if mqtt_alerts:
        lines += ["[[hook]]", 'kind = "mqtt"', 'topic_prefix = "thermeta/alert"', ""]
    return "\n".join(lines)


def truth_lines(scenario: Scenario) -> list[str]:
    """What really happens, in words: for people comparing forecasts with the truth."""
    from thermeta.daemon.timefmt import duration, local_clock

    def after(t: float) -> str:
        return (
            "at the start"
            if t - scenario.t_start < 30
            else f"after {duration(t - scenario.t_start)}"
        )

    out = [
        f"scenario {scenario.name}: {scenario.title}; starts {local_clock(scenario.t_start, True)}"
    ]
    for t, text in scenario.events:
        out.append(f"  event {after(t)}: {text.replace(' degC', ' °C')}")
    for p in scenario.loads:
        c = p.crossing_t_true
        when = (
            "never crosses"
            if c is None
            else f"crosses {p.spec.threshold:g} °C {after(c)} ({local_clock(c)})"
        )
        out.append(f"  {p.name}: {when}")
        if "stage1_met" in p.truth:
            ok1 = "met" if p.truth["stage1_met"] else "MISSED"
            ok2 = "met" if p.truth["stage2_met"] else "MISSED"
            out.append(
                f"    cooling schedule: 57 to 21 °C within 2 h {ok1}; to 5 °C within 6 h {ok2}"
            )
    return out
