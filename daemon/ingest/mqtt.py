"""The MQTT side of the daemon (paho-mqtt 2.x): a durable QoS 1 subscriber and a publisher.

Durability, from paho's own behaviour:

- a fixed client id and a persistent session (MQTT 5: ``clean_start=False`` with a
  SessionExpiryInterval; 3.1.1: ``clean_session=False``), so what is published while the daemon
  is down waits in the broker;
- ``manual_ack=True``: a message's PUBACK is sent only after the writer has committed it;
  acknowledgements for a message from an earlier connection are dropped (the broker resends
  those and the store's unique key absorbs the copy);
- ``on_message`` only hands the message on, inside a try/except: an exception there would kill
  paho's network thread;
- subscriptions are made in ``on_connect`` so every reconnect renews them.

Oversized payloads: under MQTT 5 the daemon announces a Maximum Packet Size (the largest
payload it keeps, ``[ingest] max_payload_bytes``, plus room for topic and properties), so the
broker never sends it a bigger one; under 3.1.1 a bigger one is cut to its first bytes on
arrival and goes on only as a dead letter, so a huge payload is not copied through the writer.
"""

from __future__ import annotations

import json
import logging
import socket
import ssl
import struct
import threading
import time
import uuid
from collections.abc import Callable
from typing import Any

import paho.mqtt.client as mqtt
from paho.mqtt.packettypes import PacketTypes
from paho.mqtt.properties import Properties
from thermeta.daemon.clock import Clock
from thermeta.daemon.config import BrokerConfig
from thermeta.daemon.ingest.writer import Inbound

log = logging.getLogger("thermeta.mqtt")
PAHO_LOG = logging.getLogger("thermeta.mqtt.paho")


class _LostConnectionEcho(logging.Filter):
    """paho logs a dropped connection once more at ERROR from its network loop ("... Client is
    not connected"); ``on_disconnect`` has said it already, as a warning."""

    def filter(self, record: logging.LogRecord) -> bool:
        return not (record.levelno >= logging.ERROR and "not connected" in record.getMessage())


PAHO_LOG.addFilter(_LostConnectionEcho())

FLAP_WINDOW_S = 30.0  # this many seconds ...
FLAP_SHORT_S = 5.0  # ... holding connections closed within this long after they opened ...
FLAP_COUNT = 3  # ... this often: someone else is using our client id
UNSUPPORTED_PROTOCOL = (1, 132)  # 3.1.1 CONNACK code 1; MQTT 5 reason 0x84
PACKET_OVERHEAD = 8192  # bytes beside the payload in a PUBLISH: the topic, properties, header
FALLBACK_WAIT_S = 3.0
RETAINED_GRACE_S = 0.5  # after the SUBACK: how long a retained message may lag it


def tls_problem(cfg: BrokerConfig, timeout_s: float = 3.0) -> str | None:
    """Why a TLS session with the broker fails, in one line, or None (no TLS problem found).

    paho reports a failed handshake only as a failed connection, so this shakes hands itself
    with the same settings: the broker's certificate (CA, host name) is checked in the
    handshake; a refused client certificate shows as the broker's alert just after it."""
    try:
        ctx = ssl.SSLContext(ssl.PROTOCOL_TLS_CLIENT)
        if cfg.ca_file:
            ctx.load_verify_locations(cfg.ca_file)
        else:
            ctx.load_default_certs()
        if cfg.cert_file:
            ctx.load_cert_chain(cfg.cert_file, cfg.key_file)
        if cfg.tls_insecure:
            ctx.check_hostname = False
            ctx.verify_mode = ssl.CERT_NONE
    except (OSError, ssl.SSLError) as exc:
        return f"cannot load the TLS files: {exc}"
    try:
        with (
            socket.create_connection((cfg.host, cfg.port), timeout_s) as raw,
            ctx.wrap_socket(raw, server_hostname=cfg.host) as tls,
        ):
            tls.settimeout(1.0)
            try:
                tls.recv(1)
            except ssl.SSLError as exc:
                return f"the broker refused our client certificate ({exc.reason or exc})"
            except OSError:
                pass
            return None
    except ssl.SSLCertVerificationError as exc:
        return f"the broker's certificate is not trusted: {exc.verify_message or exc}"
    except ssl.SSLError as exc:
        return f"the TLS handshake failed: {exc.reason or exc}"
    except OSError:
        return None  # not reachable: not a TLS problem


def _credentials(c: mqtt.Client, cfg: BrokerConfig) -> None:
    """The broker's user name, password and TLS settings, as configured."""
    if cfg.username:
        c.username_pw_set(cfg.username, cfg.password)
    if cfg.tls:
        c.tls_set(
            ca_certs=cfg.ca_file,
            certfile=cfg.cert_file,
            keyfile=cfg.key_file,
            tls_version=ssl.PROTOCOL_TLS_CLIENT,
        )
        if cfg.tls_insecure:
            c.tls_insecure_set(True)


def read_retained(cfg: BrokerConfig, topic: str, timeout_s: float = 3.0) -> dict[str, Any] | None:
    """The retained JSON object on ``topic``, read by a short-lived client of its own (a random
    client id, clean session, no will: it takes over no one's session), or None (none retained,
    not JSON, or the broker not reachable within ``timeout_s``)."""
    name = f"thermeta-check-{uuid.uuid4().hex[:12]}"
    if cfg.protocol == "5":  # MQTT 5 connects with clean_start by default
        c = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id=name, protocol=mqtt.MQTTv5)
    else:
        c = mqtt.Client(
            mqtt.CallbackAPIVersion.VERSION2,
            client_id=name,
            protocol=mqtt.MQTTv311,
            clean_session=True,
        )
    c.enable_logger(PAHO_LOG)
    _credentials(c, cfg)
    c.connect_timeout = timeout_s
    subscribed, got = threading.Event(), threading.Event()
    found: list[bytes] = []

    def on_message(client, userdata, msg) -> None:
        found.append(msg.payload)  # retained, or a live one just published: both tell
        got.set()

    c.on_connect = lambda client, *a: client.subscribe(topic, qos=0)
    c.on_subscribe = lambda *a: subscribed.set()
    c.on_message = on_message
    try:
        c.connect(cfg.host, cfg.port, keepalive=max(5, int(timeout_s) * 2))
    except (OSError, ValueError, ssl.SSLError):
        return None  # not reachable here: the durable connection says why, and retries
    c.loop_start()
    try:
        # the broker sends what is retained right after (or just before) the SUBACK
        if subscribed.wait(timeout_s) and not got.is_set():
            got.wait(RETAINED_GRACE_S)
    finally:
        c.disconnect()
        c.loop_stop()
    try:
        body = json.loads(found[0]) if found else None
    except ValueError:
        return None
    return body if isinstance(body, dict) else None


PUBACK = 0x40  # MQTT control packet type 4, flags 0


def _pubacks(mids: list[int]) -> bytes:
    """PUBACK packets for ``mids``, back to back: each is 0x40, 0x02 and the two-byte packet id,
    i.e. the big-endian 32-bit number 0x40020000 + id (MQTT 3.1.1 sec. 3.4; MQTT 5 sec. 3.4.2.1
    lets a success PUBACK leave out its reason code and properties)."""
    return struct.pack(f"!{len(mids)}I", *[0x40020000 | mid for mid in mids])


class MqttLink:
    """One broker connection: subscribe to ``filters``, hand messages to ``deliver``."""

    def __init__(
        self,
        cfg: BrokerConfig,
        filters: list[str],
        deliver: Callable[[Inbound], None],
        clock: Clock,
        status_topic: str,
        status_extra: dict[str, Any] | None = None,
        max_payload_bytes: int | None = None,
        share_group: str | None = None,
    ):
        self.cfg = cfg
        # [cluster]: each message goes to one daemon of the group (MQTT 5 shared subscription);
        # msg.topic stays the plain topic, so nothing else changes
        self.share_group = share_group
        self.filters = list(filters)
        self.deliver = deliver
        self.clock = clock
        self.status_topic = status_topic
        self.status_extra = dict(status_extra or {})
        self.max_payload_bytes = max_payload_bytes
        self.generation = 0
        self.connected = threading.Event()
        self.accepting = True
        self.protocol = mqtt.MQTTv5 if cfg.protocol in ("auto", "5") else mqtt.MQTTv311
        self.counts = {"received": 0, "dropped": 0, "connects": 0, "disconnects": 0}
        self._refused: int | None = None
        self._outcome: str | None = None  # first answer: connected | refused | closed | unreachable
        self._first_connack = threading.Event()
        self._lock = threading.Lock()
        self._connected_at = 0.0
        self._short_drops: list[float] = []
        self._flap_told = False
        self._tls_told: str | None = None
        self.client = self._make_client()

    # -- set-up -------------------------------------------------------------------------------
    def _make_client(self) -> mqtt.Client:
        kw: dict[str, Any] = {
            "client_id": self.cfg.client_id,
            "protocol": self.protocol,
            "manual_ack": True,
        }
        if self.protocol == mqtt.MQTTv311:
            kw["clean_session"] = False
        c = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, **kw)
        c.enable_logger(PAHO_LOG)
        _credentials(c, self.cfg)
        c.will_set(self.status_topic, self._status("offline"), qos=1, retain=True)
        c.reconnect_delay_set(min_delay=1, max_delay=30)
        c.max_queued_messages_set(0)
        c.on_connect = self._on_connect
        c.on_connect_fail = self._on_connect_fail
        c.on_disconnect = self._on_disconnect
        c.on_message = self._on_message
        return c

    def _status(self, state: str) -> str:
        body = {
            "state": state,
            "at": self.clock.now(),
            "heartbeat_wall": time.time(),
            "client_id": self.cfg.client_id,
        }
        body.update(self.status_extra)
        return json.dumps(body)

    def beat(self) -> None:
        """Renew the retained ``online`` status (its ``heartbeat_wall`` moves while we live: how
        a daemon on another host tells a live holder of this client id from a stale status)."""
        if self.connected.is_set() and self.accepting:
            self.client.publish(self.status_topic, self._status("online"), qos=1, retain=True)

    def start(self) -> None:
        """Connect in the background (paho retries on its own).  With ``protocol = "auto"`` try
        MQTT 5 first and, if the broker refuses it or never answers, MQTT 3.1.1."""
        if self.cfg.protocol != "auto":
            self._launch()
            return
        for proto in (mqtt.MQTTv5, mqtt.MQTTv311):
            self.protocol = proto
            self._launch()
            answered = self._first_connack.wait(FALLBACK_WAIT_S)
            outcome = self._outcome
            if answered and outcome in ("connected", "unreachable"):
                return  # an unreachable broker: keep trying with this version (paho retries)
            if answered and outcome == "refused" and self._refused not in UNSUPPORTED_PROTOCOL:
                return  # refused for another reason (credentials): the log says which
            if proto == mqtt.MQTTv5:
                log.info(
                    "broker did not accept MQTT 5 (%s); trying MQTT 3.1.1", outcome or "no answer"
                )
            self.client.loop_stop()
            self.client.disconnect()
        log.warning("broker answered neither MQTT 5 nor 3.1.1; retrying with MQTT 5")
        self.protocol = mqtt.MQTTv5
        self._launch()

    def _launch(self) -> None:
        self._first_connack.clear()
        self._outcome = None
        self._refused = None
        self.client = self._make_client()
        self._connect_async()
        self.client.loop_start()

    def _connect_async(self) -> None:
        if self.protocol == mqtt.MQTTv5:
            props = Properties(PacketTypes.CONNECT)
            props.SessionExpiryInterval = int(self.cfg.session_expiry_s)
            # Unacknowledged messages the broker may send ahead (MQTT 5 Receive Maximum); for
            # 3.1.1 the broker's max_inflight_messages plays this part.
            props.ReceiveMaximum = int(self.cfg.receive_maximum)
            if self.max_payload_bytes:
                props.MaximumPacketSize = int(self.max_payload_bytes) + PACKET_OVERHEAD
            self.client.connect_async(
                self.cfg.host,
                self.cfg.port,
                self.cfg.keepalive_s,
                clean_start=False,
                properties=props,
            )
        else:
            self.client.connect_async(self.cfg.host, self.cfg.port, self.cfg.keepalive_s)

    # -- paho callbacks (network thread: keep them short, never raise) ------------------------
    def _on_connect(self, client, userdata, flags, reason_code, properties) -> None:
        try:
            if reason_code.is_failure:
                self._refused = int(reason_code.value)
                self._outcome = self._outcome or "refused"
                log.error(
                    "broker %s:%s refused the connection: %s",
                    self.cfg.host,
                    self.cfg.port,
                    reason_code,
                )
                self._first_connack.set()
                return
            with self._lock:
                self.generation += 1
            self.counts["connects"] += 1
            self._connected_at = time.monotonic()
            resumed = bool(getattr(flags, "session_present", False))
            log.info(
                "connected to %s:%s (MQTT %s, session %s)",
                self.cfg.host,
                self.cfg.port,
                "5" if self.protocol == mqtt.MQTTv5 else "3.1.1",
                "resumed" if resumed else "new",
            )
            share = f"$share/{self.share_group}/" if self.share_group else ""
            client.subscribe([(share + f, self.cfg.qos) for f in self.filters])
            log.info("watching %d topic filter(s)", len(self.filters))
            client.publish(self.status_topic, self._status("online"), qos=1, retain=True)
            self.connected.set()
            self._outcome = self._outcome or "connected"
            self._first_connack.set()
        except Exception:  # noqa: BLE001 - an exception here would stop paho's thread
            log.exception("error in on_connect")

    def _on_connect_fail(self, client, userdata) -> None:
        try:
            if self._tell_tls():
                self._outcome = self._outcome or "refused"
            else:
                self._outcome = self._outcome or "unreachable"
                log.warning("cannot reach broker %s:%s; retrying", self.cfg.host, self.cfg.port)
            self._first_connack.set()
        except Exception:  # noqa: BLE001
            log.exception("error in on_connect_fail")

    def _on_disconnect(self, client, userdata, flags, reason_code, properties) -> None:
        try:
            if not self.connected.is_set() and self._outcome is None:
                # closed before any CONNACK: maybe the version, maybe our TLS certificate
                self._outcome = "refused" if self._tell_tls() else "closed"
                self._first_connack.set()
            was_connected = self.connected.is_set()
            self.connected.clear()
            self.counts["disconnects"] += 1
            if reason_code != 0:
                if was_connected:
                    self._note_drop()
                log.warning("disconnected from broker (%s); reconnecting", reason_code)
        except Exception:  # noqa: BLE001
            log.exception("error in on_disconnect")

    def _tell_tls(self) -> bool:
        """With TLS on, find and log (once per cause) why the TLS session fails; True if so."""
        if not self.cfg.tls:
            return False
        why = tls_problem(self.cfg)
        if why is None:
            return False
        if why != self._tls_told:
            self._tls_told = why
            log.error("TLS with broker %s:%s fails: %s", self.cfg.host, self.cfg.port, why)
        return True

    def _note_drop(self) -> None:
        """The broker closed a connection of ours: closed again and again right after it opened,
        the likely cause is another client with our client id (each connect throws the other
        off), which the broker does not say.  Say it once, naming the id."""
        now = time.monotonic()
        if now - self._connected_at > FLAP_SHORT_S:
            return
        self._short_drops = [t for t in self._short_drops if now - t < FLAP_WINDOW_S] + [now]
        if len(self._short_drops) >= FLAP_COUNT and not self._flap_told:
            self._flap_told = True
            log.error(
                "the broker keeps closing our connection right after it opens (%d times in %g s): "
                "another client took over client id %s? Two daemons must not share a "
                "[broker] client_id",
                len(self._short_drops),
                FLAP_WINDOW_S,
                self.cfg.client_id,
            )

    def _on_message(self, client, userdata, msg) -> None:
        try:
            if not self.accepting:
                # Not acknowledged: the broker keeps it for the next session.
                self.counts["dropped"] += 1
                return
            self.counts["received"] += 1
            payload, size = msg.payload, 0
            cap = self.max_payload_bytes
            if cap and len(payload) > cap:  # kept only as a dead letter's excerpt
                payload, size = payload[: min(cap, 4096)], len(payload)
            self.deliver(
                Inbound(
                    msg.topic,
                    payload,
                    self.clock.now(),
                    msg.mid,
                    msg.qos,
                    self.generation,
                    size,
                )
            )
        except Exception:  # noqa: BLE001 - never let one message stop the network thread
            log.exception("error handing on a message from %s", getattr(msg, "topic", "?"))

    # -- used by the writer and the service ---------------------------------------------------
    def ack(self, batch: list[Inbound]) -> None:
        """Acknowledge committed messages (in arrival order, as MQTT requires).

        A batch's PUBACKs go out as one write: ``Client.ack()`` queues one packet per message and
        wakes paho's network thread for each, which then sends each with a system call of its
        own (most of the acks' cost, on the thread every message passes through).  Here the
        batch's PUBACKs (4 bytes each, the same in MQTT 3.1.1 and 5: type, length 2, packet id)
        are packed together and queued as one through the same internal queue ``ack()`` uses;
        where that is missing (another paho), ``ack()`` message by message."""
        gen = self.generation
        mids = [m.mid for m in batch if m.qos == 1 and m.generation == gen]
        queue_packet = getattr(self.client, "_packet_queue", None)
        if len(mids) > 1 and queue_packet is not None:
            queue_packet(PUBACK, _pubacks(mids), 0, 0)
        else:
            for mid in mids:
                self.client.ack(mid, 1)
        for m in batch:  # QoS 2 is not subscribed to ([broker] qos is 0 or 1); kept for safety
            if m.qos == 2 and m.generation == gen:
                self.client.ack(m.mid, 2)

    def publish(
        self, topic: str, payload: str | bytes, qos: int = 1, retain: bool = False
    ) -> mqtt.MQTTMessageInfo:
        return self.client.publish(topic, payload, qos=qos, retain=retain)

    def stop_receiving(self) -> None:
        self.accepting = False

    def close(self, timeout: float = 5.0) -> None:
        """Say we are going offline (retained), then disconnect cleanly (no last will)."""
        try:
            if self.connected.is_set():
                info = self.client.publish(
                    self.status_topic, self._status("offline"), qos=1, retain=True
                )
                info.wait_for_publish(timeout)
        except (RuntimeError, ValueError) as exc:
            log.warning("could not publish the offline status: %s", exc)
        # paho's network thread runs once more after the socket closes and logs that as an
        # error ("Client is not connected"); on a stop we asked for, that line would only alarm
        self.client.disable_logger()
        self.client.disconnect()
        self.client.loop_stop()
