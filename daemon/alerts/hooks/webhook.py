"""``kind = "webhook"``: an HTTP POST of the alert as JSON (or of a body template's text).

``body_template`` fills ``$name`` / ``${name}`` placeholders with alert fields (string.Template).
When the template is JSON, each value is escaped for a JSON string, so
``body_template = '{"text": "$sentence"}'`` suits chat systems that want one text field.
``token_env`` names an environment variable whose value replaces ``$token`` in header values, or,
when no header uses it, goes out as ``Authorization: Bearer <token>``.  A URL with
``user:password@`` sends them as ``Authorization: Basic``; the URL is shown without them in every
message, so they never reach the log or the outbox's ``last_error``.

``timeout`` bounds the whole delivery (connecting, sending, the answer), not each read: a
receiver that answers one byte at a time is cut off when the time is up.  (The request goes
straight to the receiver: http.client, no proxy.)
"""

from __future__ import annotations

import base64
import http.client
import json
import os
import re
import socket
import ssl
import string
import threading
import time
import urllib.parse
from dataclasses import dataclass
from typing import Annotated, Any, Literal

from pydantic import AfterValidator, BeforeValidator, Field
from thermeta.daemon.alerts.hooks.base import Hook, TimedHookConfig
from thermeta.daemon.settings.checks import EnvName, Text, problem, show
from thermeta.storage.errors import DeliveryError


def _http_url(url: str) -> str:
    if not re.match(r"^https?://[^/\s]+", url):
        raise problem(f"must be an http:// or https:// URL, got {show(url)}")
    return url


def _string_table(v: Any) -> Any:
    if not (isinstance(v, dict) and all(isinstance(x, str) for x in v.values())):
        raise problem("must be a table of strings")
    return v


class WebhookConfig(TimedHookConfig):
    """``[[hook]]`` with ``kind = "webhook"``."""

    kind: Literal["webhook"] = "webhook"
    url: Annotated[Text, AfterValidator(_http_url)]
    headers: Annotated[dict[str, str], BeforeValidator(_string_table)] = Field(default_factory=dict)
    body_template: Text | None = None
    token_env: EnvName | None = None


def render_template(template: str, alert: dict[str, Any]) -> tuple[bytes, str]:
    """(body, content type) of a body template filled from the alert."""
    looks_json = template.lstrip()[:1] in ("{", "[")

    def show(v: Any) -> str:
        text = "" if v is None else (json.dumps(v) if isinstance(v, (dict, list)) else str(v))
        return json.dumps(text)[1:-1] if looks_json else text

    body = string.Template(template).safe_substitute({k: show(v) for k, v in alert.items()})
    if looks_json:
        try:
            json.loads(body)
        except ValueError:
            return body.encode(), "text/plain; charset=utf-8"
        return body.encode(), "application/json"
    return body.encode(), "text/plain; charset=utf-8"


@dataclass(frozen=True)
class Request:
    """What one delivery sends: where (the URL without credentials) and what."""

    url: str
    body: bytes
    headers: dict[str, str]


def split_credentials(url: str) -> tuple[str, str | None]:
    """(the URL without ``user:password@``, the Basic authorization value or None)."""
    parts = urllib.parse.urlsplit(url)
    if parts.username is None and parts.password is None:
        return url, None
    host = parts.hostname or ""
    if ":" in host:
        host = f"[{host}]"
    netloc = host + (f":{parts.port}" if parts.port else "")
    user = urllib.parse.unquote(parts.username or "")
    password = urllib.parse.unquote(parts.password or "")
    basic = base64.b64encode(f"{user}:{password}".encode()).decode()
    return urllib.parse.urlunsplit(parts._replace(netloc=netloc)), f"Basic {basic}"


class WebhookHook(Hook[WebhookConfig]):
    kind = "webhook"
    config = WebhookConfig

    def __init__(self, *args: Any, **kw: Any):
        super().__init__(*args, **kw)
        self.url, self.basic = split_credentials(self.cfg.url)

    def request(self, alert: dict[str, Any]) -> Request:
        if self.cfg.body_template:
            body, ctype = render_template(self.cfg.body_template, alert)
        else:
            body, ctype = json.dumps(alert).encode(), "application/json"
        token = os.environ.get(self.cfg.token_env) if self.cfg.token_env else None
        headers = {
            "Content-Type": ctype,
            "User-Agent": "thermeta-alerts",
            "Idempotency-Key": alert["id"],
        }
        if self.basic:
            headers["Authorization"] = self.basic
        used_token = False
        for name, value in (self.cfg.headers or {}).items():
            if token is not None and "$token" in value:
                value = string.Template(value).safe_substitute(token=token)
                used_token = True
            headers[name] = value
        if token is not None and not used_token and "Authorization" not in headers:
            headers["Authorization"] = f"Bearer {token}"
        return Request(self.url, body, headers)

    def deliver(self, alert: dict[str, Any]) -> None:
        req = self.request(alert)
        timeout = self.cfg.timeout_s
        try:
            status = post(req, timeout)
        except TimeoutError as exc:
            raise DeliveryError(
                f"{self.key}: {self.url} gave no full answer within {timeout:g} s"
            ) from exc
        except (OSError, http.client.HTTPException, ValueError) as exc:
            reason = exc.strerror if isinstance(exc, OSError) and exc.strerror else exc
            raise DeliveryError(f"{self.key}: cannot reach {self.url}: {reason}") from exc
        if not 200 <= status < 300:
            raise DeliveryError(f"{self.key}: {self.url} answered HTTP {status}")


def post(req: Request, timeout_s: float) -> int:
    """POST ``req`` and read the answer (at most 64 KiB), all within ``timeout_s`` seconds;
    returns the HTTP status.  Raises TimeoutError when the time is up, OSError and
    http.client's errors otherwise."""
    parts = urllib.parse.urlsplit(req.url)
    deadline = time.monotonic() + timeout_s
    conn: http.client.HTTPConnection
    if parts.scheme == "https":
        ctx = ssl.create_default_context()
        conn = http.client.HTTPSConnection(
            parts.hostname or "", parts.port, timeout=timeout_s, context=ctx
        )
    else:
        conn = http.client.HTTPConnection(parts.hostname or "", parts.port, timeout=timeout_s)
    expired = threading.Event()

    def cut_off() -> None:  # ends a blocked read, however slowly the bytes come
        expired.set()
        sock = conn.sock
        if sock is not None:
            try:
                sock.shutdown(socket.SHUT_RDWR)
            except OSError:
                pass

    timer = threading.Timer(timeout_s, cut_off)
    timer.daemon = True
    timer.start()
    try:
        path = urllib.parse.urlunsplit(("", "", parts.path or "/", parts.query, ""))
        conn.request("POST", path, body=req.body, headers=req.headers)
        resp = conn.getresponse()
        resp.read(65536)
        if expired.is_set() or time.monotonic() > deadline:
            raise TimeoutError
        return int(resp.status)
    except (OSError, http.client.HTTPException) as exc:
        if expired.is_set():
            raise TimeoutError from exc
        raise
    finally:
        timer.cancel()
        conn.close()
