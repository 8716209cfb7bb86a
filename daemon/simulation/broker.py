"""An MQTT broker inside the process, for the demo when no broker is reachable.

amqtt (PyPI) is a pure-Python asyncio broker speaking MQTT 3.1.1. It runs here on its own event
loop in a daemon thread, bound to loopback only, anonymous, without its $SYS and packet-logging
plug-ins (they cost CPU and say nothing the demo needs). It is for trying thermeta out, not for a
site: it keeps nothing on disk, so an operator's broker (Mosquitto with persistence) is the real
thing.
"""

from __future__ import annotations

import asyncio
import logging
import socket
import threading
from concurrent.futures import Future
from typing import Any

log = logging.getLogger(__name__)


def free_loopback_port() -> int:
    """A TCP port that was free on 127.0.0.1 a moment ago."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def broker_reachable(host: str, port: int, timeout_s: float = 0.5) -> bool:
    """True when something accepts TCP connections at host:port (an MQTT broker, we assume)."""
    try:
        with socket.create_connection((host, port), timeout=timeout_s):
            return True
    except OSError:
        return False


def broker_accepts(host: str, port: int, timeout_s: float = 3.0) -> bool:
    """True when an MQTT broker at host:port accepts an anonymous MQTT 3.1.1 connection (a port
    that is open but refuses us, e.g. one that wants a password, is no use to the demo)."""
    if not broker_reachable(host, port, timeout_s=min(timeout_s, 0.5)):
        return False
    import paho.mqtt.client as mqtt

    ok = threading.Event()
    answered = threading.Event()

    def on_connect(client, userdata, flags, reason_code, properties):
        if not reason_code.is_failure:
            ok.set()
        answered.set()

    c = mqtt.Client(
        mqtt.CallbackAPIVersion.VERSION2, client_id="", protocol=mqtt.MQTTv311, clean_session=True
    )
    c.on_connect = on_connect
    try:
        c.connect(host, port, keepalive=10)
    except OSError:
        return False
    c.loop_start()
    try:
        answered.wait(timeout_s)
    finally:
        c.disconnect()
        c.loop_stop()
    return ok.is_set()


class EmbeddedBroker:
    """amqtt on 127.0.0.1:``port`` (a free one when 0), started and stopped from ordinary
    threads."""

    def __init__(self, port: int = 0, host: str = "127.0.0.1") -> None:
        if not 0 <= port <= 65535:
            raise ValueError(f"port must be 0..65535, got {port}")
        self.host = host
        self.port = port or free_loopback_port()
        self._loop: asyncio.AbstractEventLoop | None = None
        self._thread: threading.Thread | None = None
        self._broker: Any = None  # amqtt's Broker, once started
        self._stopped = threading.Event()

    def _config(self) -> dict:
        return {
            "listeners": {"default": {"type": "tcp", "bind": f"{self.host}:{self.port}"}},
            "plugins": {
                "amqtt.plugins.authentication.AnonymousAuthPlugin": {"allow_anonymous": True}
            },
        }

    def start(self, timeout_s: float = 10.0) -> EmbeddedBroker:
        """Start the broker thread; return once it accepts connections (raise RuntimeError if
        not)."""
        if self._thread is not None:
            raise RuntimeError("embedded broker already started")
        ready: Future = Future()

        def main() -> None:
            loop = asyncio.new_event_loop()
            self._loop = loop
            asyncio.set_event_loop(loop)
            try:
                from amqtt.broker import Broker

                async def boot() -> None:
                    broker = Broker(self._config())
                    self._broker = broker
                    await broker.start()

                loop.run_until_complete(boot())
            except Exception as exc:  # noqa: BLE001 - reported to the starting thread, which raises it
                ready.set_exception(exc)
                loop.close()
                return
            ready.set_result(True)
            try:
                loop.run_forever()
            finally:
                loop.close()
                self._stopped.set()

        # amqtt logs every connection at INFO and a client that hangs up early at ERROR; the
        # demo's own lines matter more.
        for name in ("amqtt", "transitions"):
            logging.getLogger(name).setLevel(logging.CRITICAL)
        self._thread = threading.Thread(target=main, name="embedded-mqtt-broker", daemon=True)
        self._thread.start()
        try:
            ready.result(timeout_s)
        except Exception as exc:
            raise RuntimeError(
                f"embedded MQTT broker did not start on {self.host}:{self.port}: {exc}"
            ) from exc
        log.info("embedded MQTT broker listening on %s:%d", self.host, self.port)
        return self

    def stop(self, timeout_s: float = 10.0) -> None:
        """Shut the broker down and join its thread; safe to call twice."""
        loop, broker = self._loop, self._broker
        if loop is None or self._thread is None:
            return
        if broker is not None and loop.is_running():
            fut = asyncio.run_coroutine_threadsafe(broker.shutdown(), loop)
            try:
                fut.result(timeout_s)
            except Exception as exc:  # noqa: BLE001 - shutting down: log it, still stop the loop
                log.warning("embedded broker shutdown: %s", exc)
        if loop.is_running():
            loop.call_soon_threadsafe(loop.stop)
        self._thread.join(timeout_s)
        self._thread = None
        self._loop = None
        self._broker = None

    def __enter__(self) -> EmbeddedBroker:
        return self.start()

    def __exit__(self, *exc: object) -> None:
        self.stop()
