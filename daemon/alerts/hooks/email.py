"""``kind = "email"``: SMTP with STARTTLS (``tls = "starttls"``, port 587), implicit TLS
(``"implicit"``, port 465) or none (``"none"``, a relay on the local network); login from the
environment variables named by ``username_env`` / ``password_env``.

The mail is plain text (``daemon/alerts/mail.py``: the headline as its subject, the sentence,
the site's "what to do" line, then the figures), with a PNG of the item's recent readings,
fitted curve and forecast band attached when one can be drawn.
"""

from __future__ import annotations

import os
import smtplib
import ssl
from email.message import EmailMessage
from email.utils import formatdate, make_msgid
from typing import Annotated, Any, Literal

from pydantic import AfterValidator, BeforeValidator, Field
from thermeta.daemon.alerts.hooks.base import Hook, TimedHookConfig
from thermeta.daemon.alerts.mail import body_text, subject
from thermeta.daemon.settings.checks import EnvName, PositiveInt, Text, problem, show
from thermeta.storage.errors import DeliveryError

TlsMode = Literal["starttls", "implicit", "none"]
PORTS = {"starttls": 587, "implicit": 465, "none": 25}  # each TLS mode's usual port


def _address(v: str) -> str:
    if "@" not in v:
        raise problem(f"not an email address: {show(v)}")
    return v


def _recipients(v: Any) -> tuple[str, ...]:
    if isinstance(v, str) and v.strip():
        return (v,)
    if isinstance(v, (list, tuple)) and v and all(isinstance(s, str) and s.strip() for s in v):
        return tuple(v)
    raise problem("must be an address or a list of them")


class EmailConfig(TimedHookConfig):
    """``[[hook]]`` with ``kind = "email"``."""

    kind: Literal["email"] = "email"
    host: Text
    tls: TlsMode = "starttls"
    port: PositiveInt = Field(default_factory=lambda d: PORTS.get(d["tls"], 587))
    username_env: EnvName | None = None
    password_env: EnvName | None = None
    from_addr: Annotated[Text, AfterValidator(_address)] = Field(validation_alias="from")
    to: Annotated[tuple[str, ...], BeforeValidator(_recipients)]


class EmailHook(Hook[EmailConfig]):
    kind = "email"
    config = EmailConfig

    def message(self, alert: dict[str, Any]) -> EmailMessage:
        msg = EmailMessage()
        msg["From"] = self.cfg.from_addr
        msg["To"] = ", ".join(self.cfg.to)
        msg["Subject"] = subject(alert)
        msg["Date"] = formatdate(localtime=True)
        msg["Message-ID"] = make_msgid(domain="thermeta.local")
        msg["X-Thermeta-Alert"] = alert["id"]
        msg.set_content(body_text(alert))
        png = None
        if self.png_for is not None:
            try:
                png = self.png_for(alert)
            except Exception:  # noqa: BLE001 - a failed picture never stops the mail
                png = None
        if png:
            msg.add_attachment(
                png,
                maintype="image",
                subtype="png",
                filename=f"{alert['item'].replace('/', '_')}-forecast.png",
            )
        return msg

    def deliver(self, alert: dict[str, Any]) -> None:
        cfg = self.cfg
        msg = self.message(alert)
        user = os.environ.get(cfg.username_env) if cfg.username_env else None
        password = os.environ.get(cfg.password_env) if cfg.password_env else None
        ctx = ssl.create_default_context()
        try:
            if cfg.tls == "implicit":
                smtp: smtplib.SMTP = smtplib.SMTP_SSL(
                    cfg.host, cfg.port, timeout=cfg.timeout_s, context=ctx
                )
            else:
                smtp = smtplib.SMTP(cfg.host, cfg.port, timeout=cfg.timeout_s)
            with smtp:
                if cfg.tls == "starttls":
                    smtp.starttls(context=ctx)
                if user is not None:
                    smtp.login(user, password or "")
                smtp.send_message(msg)
        except (smtplib.SMTPException, OSError, ssl.SSLError) as exc:
            raise DeliveryError(
                f"{self.key}: mail via {cfg.host}:{cfg.port} failed: "
                f"{exc.__class__.__name__}: {exc}"
            ) from exc
