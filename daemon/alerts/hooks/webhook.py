"""``kind = "webhook"``: an HTTP POST of the alert as JSON (or of a body template's text).

``body_template`` fills ``$name`` / ``${name}`` placeholders with alert fields (string.Template).
When the template is JSON, each value is escaped for a JSON string, so
``body_template = '{"text": "$sentence"}'`` suits chat systems that want one text field.
``token_env`` names an environment variable whose value replaces ``$token`` in header values, or,
when no header uses it, goes out as ``Authorization: Bearer <token>``.
"""

from __future__ import annotations

import json
import os
import re
import string
import urllib.error
import urllib.request
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


class WebhookHook(Hook[WebhookConfig]):
    kind = "webhook"
    config = WebhookConfig

    def request(self, alert: dict[str, Any]) -> urllib.request.Request:
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
        used_token = False
        for name, value in (self.cfg.headers or {}).items():
            if token is not None and "$token" in value:
                value = string.Template(value).safe_substitute(token=token)
                used_token = True
            headers[name] = value
        if token is not None and not used_token and "Authorization" not in headers:
            headers["Authorization"] = f"Bearer {token}"
        return urllib.request.Request(self.cfg.url, data=body, headers=headers, method="POST")

    def deliver(self, alert: dict[str, Any]) -> None:
        req = self.request(alert)
        try:
            with urllib.request.urlopen(req, timeout=self.cfg.timeout_s) as resp:
                resp.read(65536)
        except urllib.error.HTTPError as exc:
            raise DeliveryError(f"{self.key}: {self.cfg.url} answered HTTP {exc.code}") from exc
        except (urllib.error.URLError, OSError, ValueError) as exc:
            reason = getattr(exc, "reason", exc)
            raise DeliveryError(f"{self.key}: cannot reach {self.cfg.url}: {reason}") from exc
