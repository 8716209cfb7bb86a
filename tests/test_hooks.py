"""Each alert hook against a real receiver: an HTTP server on loopback, an SMTP server (aiosmtpd)
with STARTTLS and with implicit TLS, a real program for exec, and Mosquitto read by
``mosquitto_sub`` for mqtt."""

from __future__ import annotations

import email
import email.header
import json
import ssl
import subprocess
import sys
import threading
import time
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from pathlib import Path

import pytest
from thermeta.daemon.alerts.hooks import KINDS
from thermeta.daemon.alerts.hooks.base import hook_key, make_hook
from thermeta.daemon.refit.rounds import ForecastUpdate
from thermeta.daemon.states import ItemState
from thermeta.storage.errors import DeliveryError

ALERT = {
    "id": "trailer-4:1:approaching:1",
    "item": "trailer-4",
    "event": "approaching",
    "level": "limit",
    "reminder": False,
    "incident": 1,
    "value_now": -16.4,
    "threshold": -15.0,
    "unit": "C",
    "eta_s": 2520.0,
    "ambient": 12.0,
    "time_constant_s": 36000.0,
    "state": "approaching",
    "sentence": 'trailer-4 is approaching its limit: "quoted" -16.4 °C now, in 42 min.',
    "caution": "Forecasts support decisions.",
}


class Receiver(ThreadingHTTPServer):
    """A loopback HTTP server recording every POST (path, headers, body); answers ``status``."""

    def __init__(self, port: int = 0, status: int = 200):
        self.posts: list[tuple[str, dict, bytes]] = []
        self.status = status
        outer = self

        class Handler(BaseHTTPRequestHandler):
            def do_POST(self):
                n = int(self.headers.get("Content-Length", 0))
                body = self.rfile.read(n)
                outer.posts.append((self.path, dict(self.headers), body))
                self.send_response(outer.status)
                self.send_header("Content-Length", "0")
                self.end_headers()

            def log_message(self, *args):
                return

        super().__init__(("127.0.0.1", port), Handler)
        self.thread = threading.Thread(target=self.serve_forever, daemon=True)
        self.thread.start()

    @property
    def url(self) -> str:
        return f"http://127.0.0.1:{self.server_address[1]}/alerts"

    def close(self) -> None:
        self.shutdown()
        self.server_close()


@pytest.fixture
def receiver():
    r = Receiver()
    yield r
    r.close()


def hook_config(**kw):
    """The config of a [[hook]] of ``kind``, built in code."""
    return KINDS[kw["kind"]].config(**kw)


def hook(**kw):
    cfg = hook_config(**kw)
    return make_hook(0, cfg)


def test_webhook_posts_the_alert_json_with_token_from_env(receiver, monkeypatch):
    """The default body is the alert as JSON; token_env becomes a Bearer header; the alert id
    rides along for receivers that deduplicate."""
    monkeypatch.setenv("T_HOOK_TOKEN", "s3cret")
    h = hook(
        kind="webhook", url=receiver.url, token_env="T_HOOK_TOKEN", headers={"X-Site": "north-yard"}
    )
    h.deliver(ALERT)
    assert len(receiver.posts) == 1
    path, headers, body = receiver.posts[0]
    assert path == "/alerts"
    assert json.loads(body) == ALERT
    assert headers["Authorization"] == "Bearer s3cret"
    assert headers["X-Site"] == "north-yard"
    assert headers["Idempotency-Key"] == ALERT["id"]
    assert headers["Content-Type"] == "application/json"


def test_webhook_body_template_for_a_single_text_field(receiver, monkeypatch):
    """A chat-style template gets the sentence JSON-escaped into one text field, and $token is
    placed where a header asks for it."""
    monkeypatch.setenv("T_CHAT", "abc")
    h = hook(
        kind="webhook",
        url=receiver.url,
        body_template='{"text": "$item: $sentence"}',
        token_env="T_CHAT",
        headers={"Authorization": "Token $token"},
    )
    h.deliver(ALERT)
    _, headers, body = receiver.posts[0]
    assert json.loads(body) == {"text": f"trailer-4: {ALERT['sentence']}"}
    assert headers["Authorization"] == "Token abc"


def test_webhook_failures_are_delivery_errors(receiver):
    """An HTTP 500 and a closed port both raise DeliveryError naming the hook and URL."""
    receiver.status = 500
    with pytest.raises(DeliveryError, match="HTTP 500"):
        hook(kind="webhook", url=receiver.url).deliver(ALERT)
    from conftest import free_port

    dead = f"http://127.0.0.1:{free_port()}/x"
    with pytest.raises(DeliveryError, match="cannot reach"):
        hook(kind="webhook", url=dead, timeout_s=2.0).deliver(ALERT)


def test_exec_gets_json_on_stdin_and_env_without_a_shell(tmp_path):
    """The program reads the alert from stdin and THERMETA_* variables; an argument with shell
    characters arrives verbatim (no shell)."""
    out = tmp_path / "got.json"
    prog = tmp_path / "prog.py"
    prog.write_text(
        "import json, os, sys\n"
        "data = json.load(sys.stdin)\n"
        "env = {k: v for k, v in os.environ.items() if k.startswith('THERMETA_')}\n"
        "open(sys.argv[1], 'w')"
        ".write(json.dumps({'stdin': data, 'env': env, 'argv': sys.argv[2:]}))\n"
    )
    h = hook(kind="exec", command=(sys.executable, str(prog), str(out), "$(touch x); ls"))
    h.deliver(ALERT)
    got = json.loads(out.read_text())
    assert got["stdin"] == ALERT
    assert got["env"]["THERMETA_ITEM"] == "trailer-4"
    assert got["env"]["THERMETA_EVENT"] == "approaching"
    assert got["env"]["THERMETA_LEVEL"] == "limit"
    assert got["env"]["THERMETA_REMINDER"] == "false"
    assert got["env"]["THERMETA_SENTENCE"] == ALERT["sentence"]
    assert got["argv"] == ["$(touch x); ls"]
    assert not (tmp_path / "x").exists()


def test_exec_timeout_and_failure_are_delivery_errors(tmp_path):
    """A program past its timeout is stopped; a non-zero exit reports its last stderr line."""
    slow = hook(
        kind="exec", command=(sys.executable, "-c", "import time; time.sleep(30)"), timeout_s=0.5
    )
    t0 = time.monotonic()
    with pytest.raises(DeliveryError, match="timeout"):
        slow.deliver(ALERT)
    assert time.monotonic() - t0 < 5
    bad = hook(
        kind="exec",
        command=(
            sys.executable,
            "-c",
            "import sys; sys.stderr.write('no ticket system\\n'); sys.exit(3)",
        ),
    )
    with pytest.raises(DeliveryError, match="exited with 3: no ticket system"):
        bad.deliver(ALERT)
    with pytest.raises(DeliveryError, match="cannot run"):
        hook(kind="exec", command=(str(tmp_path / "missing"),)).deliver(ALERT)


def test_mqtt_hook_publishes_to_thermeta_alert_item(broker):
    """mosquitto_sub on thermeta/alert/trailer-4 receives the alert JSON."""
    import paho.mqtt.client as mqtt

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
            "-C",
            "1",
            "-W",
            "10",
            "-v",
        ],
        stdout=subprocess.PIPE,
        text=True,
    )
    client = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id="t-hook")
    client.connect(broker.host, broker.port)
    client.loop_start()
    try:
        time.sleep(0.5)  # let mosquitto_sub subscribe
        h = make_hook(0, hook_config(kind="mqtt"), publish=client.publish)
        h.deliver(ALERT)
        out, _ = sub.communicate(timeout=15)
    finally:
        client.loop_stop()
        client.disconnect()
    topic, payload = out.strip().split(" ", 1)
    assert topic == "thermeta/alert/trailer-4"
    assert json.loads(payload) == ALERT
    with pytest.raises(DeliveryError, match="no broker"):
        make_hook(0, hook_config(kind="mqtt")).deliver(ALERT)


def test_hook_filters_and_keys():
    """items (with * patterns) and events limit a hook; keys are the name or kind-position."""
    h = make_hook(
        2, hook_config(kind="webhook", url="http://x", items=("trailer-*",), events=("crossed",))
    )
    assert h.key == "webhook-3"
    assert h.wants(dict(ALERT, event="crossed"))
    assert not h.wants(ALERT)
    assert not h.wants(dict(ALERT, item="room-1", event="crossed"))
    assert hook_key(0, hook_config(kind="exec", name="pager", command=("/bin/true",))) == "pager"


# -- email ------------------------------------------------------------------------------------
def _cert(tmp_path: Path) -> tuple[Path, Path]:
    key, crt = tmp_path / "key.pem", tmp_path / "cert.pem"
    subprocess.run(
        [
            "openssl",
            "req",
            "-x509",
            "-newkey",
            "rsa:2048",
            "-nodes",
            "-keyout",
            str(key),
            "-out",
            str(crt),
            "-days",
            "1",
            "-subj",
            "/CN=localhost",
            "-addext",
            "subjectAltName=DNS:localhost,IP:127.0.0.1",
        ],
        check=True,
        capture_output=True,
    )
    return key, crt


class Inbox:
    def __init__(self):
        self.messages: list[email.message.Message] = []
        self.logins: list[tuple[str, str]] = []

    async def handle_DATA(self, server, session, envelope):
        self.messages.append(email.message_from_bytes(envelope.original_content))
        return "250 OK"


def _auth(inbox: Inbox):
    from aiosmtpd.smtp import AuthResult, LoginPassword

    def check(server, session, envelope, mechanism, auth_data):
        if isinstance(auth_data, LoginPassword):
            inbox.logins.append((auth_data.login.decode(), auth_data.password.decode()))
            return AuthResult(success=auth_data.password == b"pw-123")
        return AuthResult(success=False)

    return check


def _png_of_a_real_forecast(tmp_path: Path) -> bytes:
    """The plotting module's PNG of a warming load stored in a real SQLite file."""
    import numpy as np
    from thermeta.daemon.config import ItemConfig
    from thermeta.daemon.views import plotting
    from thermeta.storage.store import Store

    store = Store(f"sqlite:///{tmp_path / 'png.db'}")
    store.create_all()
    iid = store.ensure_item("trailer-4", now=1.8e9)
    t = 1.8e9 + 60.0 * np.arange(90)
    # T(t) = Ta + (T0 - Ta) e^(-k t), Newton's law (invented demo numbers)
    y = 12.0 + (-20.0 - 12.0) * np.exp(-(t - t[0]) / 36000.0)
    y += np.random.default_rng(4).normal(0, 0.05, t.size)
    store.write_batch([(iid, float(a), float(b), 0, float(a)) for a, b in zip(t, y)])
    cfg = ItemConfig(name="trailer-4", topic="fleet/trailer-4/load", threshold=-15.0, ambient=12.0)
    png = plotting.item_png(store, cfg, history_s=4 * 3600)
    store.close()
    return png


def test_email_starttls_login_and_png_attachment(tmp_path, monkeypatch):
    """aiosmtpd with STARTTLS required and login: the mail arrives with the sentence in a
    plain-text body and a PNG of the curve attached; the login came from env vars."""
    from aiosmtpd.controller import Controller
    from conftest import free_port

    key, crt = _cert(tmp_path)
    monkeypatch.setenv("SSL_CERT_FILE", str(crt))  # trust our own test certificate
    monkeypatch.setenv("T_SMTP_USER", "ops")
    monkeypatch.setenv("T_SMTP_PASS", "pw-123")
    tls = ssl.create_default_context(ssl.Purpose.CLIENT_AUTH)
    tls.load_cert_chain(crt, key)
    inbox = Inbox()
    port = free_port()
    ctl = Controller(
        inbox,
        hostname="127.0.0.1",
        port=port,
        tls_context=tls,
        require_starttls=True,
        authenticator=_auth(inbox),
        auth_require_tls=True,
    )
    ctl.start()
    try:
        png = _png_of_a_real_forecast(tmp_path)
        assert png[:8] == b"\x89PNG\r\n\x1a\n"
        cfg = hook_config(
            kind="email",
            host="127.0.0.1",
            port=port,
            tls="starttls",
            username_env="T_SMTP_USER",
            password_env="T_SMTP_PASS",
            from_addr="thermeta@yard.example",
            to=("ops@yard.example",),
        )
        make_hook(0, cfg, png_for=lambda a: png).deliver(ALERT)
    finally:
        ctl.stop()
    assert inbox.logins[0] == ("ops", "pw-123")
    assert len(inbox.messages) == 1
    msg = inbox.messages[0]
    subject = str(email.header.make_header(email.header.decode_header(msg["Subject"])))
    assert subject == "trailer-4: may cross -15.0 °C in about 42 min"
    assert msg["To"] == "ops@yard.example"
    parts = list(msg.walk())
    text = [p for p in parts if p.get_content_type() == "text/plain"][0]
    assert ALERT["sentence"] in text.get_payload(decode=True).decode()
    att = [p for p in parts if p.get_content_type() == "image/png"]
    assert len(att) == 1 and att[0].get_payload(decode=True) == png
    assert att[0].get_filename() == "trailer-4-forecast.png"


def test_email_implicit_tls(tmp_path, monkeypatch):
    """tls = "implicit": the connection is TLS from the first byte (SMTP_SSL)."""
    from aiosmtpd.controller import Controller
    from conftest import free_port

    key, crt = _cert(tmp_path)
    monkeypatch.setenv("SSL_CERT_FILE", str(crt))
    tls = ssl.create_default_context(ssl.Purpose.CLIENT_AUTH)
    tls.load_cert_chain(crt, key)
    inbox = Inbox()
    port = free_port()
    ctl = Controller(inbox, hostname="127.0.0.1", port=port, ssl_context=tls)
    ctl.start()
    try:
        cfg = hook_config(
            kind="email",
            host="127.0.0.1",
            port=port,
            tls="implicit",
            from_addr="thermeta@yard.example",
            to=("a@x.example", "b@x.example"),
        )
        make_hook(0, cfg).deliver(ALERT)
    finally:
        ctl.stop()
    assert len(inbox.messages) == 1
    assert inbox.messages[0]["To"] == "a@x.example, b@x.example"


def test_email_through_the_alert_service_attaches_the_items_curve(tmp_path):
    """Wired as the daemon wires it: a crossing raised by the alert service reaches aiosmtpd
    (tls = "none", a local relay) with the plotting module's PNG of the stored readings."""
    from aiosmtpd.controller import Controller
    from conftest import free_port
    from test_outbox import wait_for, write_config
    from thermeta.daemon.alerts.service import AlertService
    from thermeta.daemon.clock import ManualClock
    from thermeta.daemon.config import load_config
    from thermeta.storage.store import Store

    inbox = Inbox()
    port = free_port()
    ctl = Controller(inbox, hostname="127.0.0.1", port=port)
    ctl.start()
    path = write_config(
        tmp_path,
        f'[[hook]]\nkind = "email"\nhost = "127.0.0.1"\nport = {port}\n'
        'tls = "none"\nfrom = "t@yard.example"\nto = "ops@yard.example"\n',
    )
    cfg = load_config(path)
    png = _png_of_a_real_forecast(tmp_path)  # same readings, written to this store below
    store = Store(cfg.storage.url)
    store.create_all()
    src = Store(f"sqlite:///{tmp_path / 'png.db'}")
    iid = store.ensure_item("trailer-4", now=1.8e9)
    store.write_batch([(iid, t, v, 0, t) for t, v in src.recent_readings("trailer-4")])
    src.close()
    t_last = store.recent_readings("trailer-4")[-1][0]
    clock = ManualClock(t_last)
    svc = AlertService(cfg, store, clock, poll_s=0.05)
    svc.start()
    try:
        base = {
            "item": "trailer-4",
            "threshold": -15.0,
            "unit": "C",
            "fit_ok": True,
            "last_reading_at": t_last,
            "warnings": [],
        }
        for state, value in ((ItemState.STEADY, -16.0), (ItemState.CROSSED, -14.5)):
            body = dict(base, state=state, value_now=value)
            svc.on_forecast(ForecastUpdate(cfg.items[0], state, body, None))
        assert wait_for(lambda: len(inbox.messages) == 1, 20)
    finally:
        svc.stop()
        ctl.stop()
        store.close()
    msg = inbox.messages[0]
    subject = str(email.header.make_header(email.header.decode_header(msg["Subject"])))
    assert subject.startswith("trailer-4: above -15.0 °C, ")
    att = [p for p in msg.walk() if p.get_content_type() == "image/png"]
    assert len(att) == 1
    got = att[0].get_payload(decode=True)
    assert got[:8] == b"\x89PNG\r\n\x1a\n" and len(got) > 10000
    # the IHDR chunk's width and height match the picture drawn directly from the same readings
    assert got[16:24] == png[16:24]
