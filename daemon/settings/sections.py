"""The config's one-off tables: [broker] [storage] [fit] [publish] [ingest] [alerts] [log]
[http] [cluster].

Secrets never sit in the file: it names environment variables (``password_env``, ``url_env``)
and the values are read from them at load time; fields holding secrets are left out of ``repr``
so they cannot reach a log line.
"""

from __future__ import annotations

import os
import re
import socket
from pathlib import Path
from typing import Annotated, ClassVar, Literal

from pydantic import AfterValidator, BeforeValidator, Field, ValidationInfo, field_validator
from thermeta.daemon.settings.checks import (
    Bool,
    Checks,
    Int,
    NonNegative,
    Positive,
    PositiveInt,
    Table,
    Text,
    env_problem,
    problem,
    show,
)
from thermeta.daemon.states import Event, Model

DEFAULT_STORE_URL = "sqlite:///thermeta.db"


def _port(v: int) -> int:
    if not 0 < v < 65536:
        raise problem(f"must be 1-65535, got {v}")
    return v


def _database_url(url: str) -> str:
    if not re.match(r"^[A-Za-z][A-Za-z0-9+]*://", url):
        raise problem(
            "must be a database URL such as sqlite:///thermeta.db or "
            "postgresql+psycopg://user@host/db"
        )
    return url


def _no_wildcards(topic: str) -> str:
    if any(ch in topic for ch in "+#"):
        raise problem("must not contain the wildcards + or #")
    return topic


def _what_to_do(v: object) -> str | dict[str, str]:
    """One line for every warning, or a table of lines by event (``crossed = "..."``)."""
    if isinstance(v, str):
        if not v.strip():
            raise problem("must not be empty")
        return v.strip()
    if isinstance(v, dict) and v:
        events = [str(e) for e in Event]
        for key, text in v.items():
            if key not in events:
                raise problem(f"unknown event {show(key)} (events: {', '.join(events)})")
            if not isinstance(text, str) or not text.strip():
                raise problem(f"{key}: must be a line of text")
        return {k: t.strip() for k, t in v.items()}
    raise problem('must be a line of text, or a table of lines by event (crossed = "...")')


Port = Annotated[Int, AfterValidator(_port)]
PublishTopic = Annotated[Text, AfterValidator(_no_wildcards)]


class BrokerConfig(Table):
    """[broker]: the MQTT broker thermeta subscribes to and publishes on."""

    host: Text = "127.0.0.1"
    ca_file: Text | None = None
    cert_file: Text | None = None
    key_file: Text | None = None
    # any TLS file turns TLS on; the port follows
    tls: Bool = Field(default_factory=lambda d: bool(d["ca_file"] or d["cert_file"]))
    port: Port = Field(default_factory=lambda d: 8883 if d["tls"] else 1883)
    # keep it fixed: the broker keeps this id's session (and queued readings) while we are down
    client_id: Text = Field(default_factory=lambda: f"thermeta-{socket.gethostname()}"[:64])
    protocol: Literal["auto", "5", "3.1.1"] = "auto"  # "auto" tries MQTT 5, then 3.1.1
    keepalive_s: PositiveInt = Field(60, validation_alias="keepalive")
    session_expiry_s: PositiveInt = Field(7 * 86400, validation_alias="session_expiry")
    qos: Literal[0, 1] = 1
    # MQTT 5: unacknowledged messages the broker may send ahead
    receive_maximum: Annotated[PositiveInt, AfterValidator(_port)] = 4000
    username: Text | None = None
    password_env: Text | None = None
    password: str | None = Field(
        default_factory=lambda d: os.environ.get(d["password_env"]) if d["password_env"] else None,
        repr=False,
    )
    tls_insecure: Bool = False

    refused: ClassVar[dict[str, str]] = {
        "password": "put the password in an environment variable and name it with password_env"
    }

    @field_validator("tls")
    @classmethod
    def _files_mean_tls(cls, tls: bool, info: ValidationInfo) -> bool:
        return tls or bool(info.data.get("ca_file") or info.data.get("cert_file"))

    def check(self, checks: Checks) -> None:
        for key in ("ca_file", "cert_file", "key_file"):
            path = getattr(self, key)
            if path is not None and not Path(path).is_file():
                checks.add(key, f"no such file: {path}")
        if self.key_file and not self.cert_file:
            checks.add("key_file", "needs broker.cert_file too")
        if self.password_env:
            why = env_problem(self.password_env)
            if why is not None:
                checks.add("password_env", why)
            if not self.username:
                checks.add(
                    "username", "missing (a password needs a username)", at=("password_env",)
                )


class StorageConfig(Table):
    """[storage]: the store's URL (or the environment variable holding it) and its batching."""

    url_env: Text | None = None
    url: Annotated[Text, AfterValidator(_database_url)] = Field(
        default_factory=lambda d: (
            os.environ.get(d["url_env"], DEFAULT_STORE_URL) if d["url_env"] else DEFAULT_STORE_URL
        ),
        validate_default=True,
        repr=False,
    )
    retention_days: NonNegative = 90.0  # 0 keeps everything
    history_days: NonNegative | None = None  # forecast history; default retention_days
    batch_size: PositiveInt = 500
    batch_ms: PositiveInt = 200

    def check(self, checks: Checks) -> None:
        if self.url_env:
            if "url" in self.model_fields_set:
                checks.add("url_env", "give url or url_env, not both")
            why = env_problem(self.url_env)
            if why is not None:
                checks.add("url_env", why)


class FitRules(Table):
    """How an item is fitted: [fit] sets them for all, an [[item]] may set its own."""

    window_s: Positive = Field(7200.0, validation_alias="window")
    min_points: Annotated[Int, Field(ge=3)] = 8
    model: Model = "lumped"


class FitConfig(FitRules):
    """[fit]: how often items are refitted, and the fit rules' defaults."""

    refit_every_s: Positive = Field(30.0, validation_alias="refit_every")
    # processes fitting a round's chunks (daemon/refit/workers.py); None: the cores less one
    workers: Annotated[Int, Field(ge=0)] | None = None


class PublishConfig(Table):
    """[publish]: where forecasts (retained) and the service's status go."""

    topic_prefix: Annotated[PublishTopic, AfterValidator(lambda t: t.rstrip("/"))] = (
        "thermeta/forecast"
    )
    status_topic: PublishTopic = "thermeta/status"
    qos: Literal[0, 1] = 1
    retain: Bool = True


class IngestConfig(Table):
    """[ingest]: what a payload may be before it is set aside as a dead letter."""

    max_payload_bytes: PositiveInt = 16384
    max_future_s: NonNegative = Field(300.0, validation_alias="max_future")
    dead_letter_chars: PositiveInt = 500


class AlertRules(Table):
    """When an item's alerts are raised: [alerts] sets them for all, an [[item]] may set its own
    (times in seconds, the hysteresis in the item's unit)."""

    lead_s: Positive = Field(1800.0, validation_alias="lead")
    hysteresis: NonNegative = 0.5
    hold_s: Positive = Field(300.0, validation_alias="hold")
    remind_every_s: Positive = Field(1800.0, validation_alias="remind_every")
    silence_s: Positive = Field(900.0, validation_alias="silence")
    horizon_s: Positive = Field(86400.0, validation_alias="horizon")
    # A new approaching or crossed waits until its condition has held this long (an alarm delay:
    # an air probe by a busy door passes its limit for minutes at a time); 0: at once.
    delay_s: NonNegative = Field(0.0, validation_alias="delay")
    # What the operator should do, as the alert's last line: one line, or lines by event.
    what_to_do: Annotated[str | dict[str, str], BeforeValidator(_what_to_do)] | None = None


WhatToDo = Annotated[str | dict[str, str], BeforeValidator(_what_to_do)]


class AlertDefaults(AlertRules):
    """[alerts]: the alert rules' defaults for every item."""

    # A class of items' own line(s), keyed by the items' prior_class or site; an item's own
    # what_to_do wins, [alerts] what_to_do is the fallback (the loader applies it).
    what_to_do_for: dict[Text, WhatToDo] = Field(default_factory=dict)


class HttpConfig(Table):
    """[http]: the service's own figures for the monitoring that watches it, OpenMetrics at
    /metrics and a health check at /healthz (``daemon/metrics.py``); off unless ``listen``."""

    listen: str | None = None  # "127.0.0.1:9108"

    def check(self, checks: Checks) -> None:
        if self.listen is None:
            return
        host, sep, port = self.listen.rpartition(":")
        if not sep or not host or not port.isdigit() or int(port) > 65535:
            checks.add("listen", f'must be "host:port", e.g. "127.0.0.1:9108", got {self.listen!r}')


class ClusterConfig(Table):
    """[cluster]: several daemons sharing one site (``daemon/cluster/``, docs/cluster.md): the
    readings spread over the ``group`` by an MQTT 5 shared subscription, the items' refits and
    alerts by leases in the shared PostgreSQL store.  Off unless ``group`` is given."""

    group: Annotated[Text, AfterValidator(_no_wildcards)] | None = None
    # this daemon's name in the group; default its [broker] client_id, which must stay the same
    # across restarts: the broker keeps a share of the readings for that session while it is down
    instance: Text | None = None


class LogConfig(Table):
    """[log]"""

    level: Literal["debug", "info", "warning", "error"] = "info"
