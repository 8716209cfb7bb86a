"""The TOML config: parsed, validated as a whole, and turned into typed dataclasses.

Every problem found is reported as ``FILE:LINE: key: problem`` (all of them at once, not just the
first) in a :class:`~thermeta.storage.errors.ConfigError`.  Python's ``tomllib`` keeps no line
numbers, so :class:`_LineIndex` finds each table and key in the raw text.

Secrets never sit in the file: the config names environment variables (``password_env``,
``token_env``, ...) and :meth:`Config.secret` reads them; dataclass fields holding secrets are
left out of ``repr`` so they cannot reach a log line.
"""

from __future__ import annotations

import math
import os
import re
import socket
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from thermeta.daemon.ingest.topics import check_filter, is_wildcard, placeholders
from thermeta.daemon.states import AlertLevel
from thermeta.daemon.units import UNITS, to_celsius
from thermeta.storage.errors import ConfigError

ALERT_LEVELS = tuple(AlertLevel)

MODELS = ("lumped", "slab", "cylinder", "sphere", "auto")
HOOK_KINDS = ("webhook", "email", "exec", "mqtt")
TLS_MODES = ("starttls", "implicit", "none")
PROTOCOLS = ("auto", "5", "3.1.1")
NAME_RE = re.compile(r"^[A-Za-z0-9._:/{}-]+$")
AMBIENT_SUFFIX = ".ambient"
# the stored series of an item's defrost signal (daemon/ingest/defrost.py)
DEFROST_SUFFIX = ".defrost"


@dataclass(frozen=True)
class BrokerConfig:
    host: str = "127.0.0.1"
    port: int = 1883
    client_id: str = "thermeta"
    protocol: str = "auto"  # "auto" tries MQTT 5, then 3.1.1
    keepalive_s: int = 60
    session_expiry_s: int = 7 * 86400
    qos: int = 1
    receive_maximum: int = 1000  # MQTT 5: unacknowledged messages the broker may send ahead
    username: str | None = None
    password_env: str | None = None
    password: str | None = field(default=None, repr=False)
    tls: bool = False
    ca_file: str | None = None
    cert_file: str | None = None
    key_file: str | None = None
    tls_insecure: bool = False


@dataclass(frozen=True)
class StorageConfig:
    url: str = field(default="sqlite:///thermeta.db", repr=False)
    retention_days: float = 90.0  # 0 keeps everything
    batch_size: int = 500
    batch_ms: int = 200


@dataclass(frozen=True)
class FitConfig:
    refit_every_s: float = 30.0
    window_s: float = 7200.0
    min_points: int = 8
    model: str = "lumped"


@dataclass(frozen=True)
class PublishConfig:
    topic_prefix: str = "thermeta/forecast"
    status_topic: str = "thermeta/status"
    qos: int = 1
    retain: bool = True


@dataclass(frozen=True)
class IngestConfig:
    max_payload_bytes: int = 16384
    max_future_s: float = 300.0
    dead_letter_chars: int = 500


@dataclass(frozen=True)
class AlertDefaults:
    lead_s: float = 1800.0
    hysteresis: float = 0.5
    hold_s: float = 300.0
    remind_every_s: float = 1800.0
    silence_s: float = 900.0
    horizon_s: float = 86400.0
    delay_s: float = 0.0


@dataclass(frozen=True)
class ItemConfig:
    """One ``[[item]]``; for a wildcard topic ``name`` is a template of ``{N}`` topic levels."""

    name: str
    topic: str
    threshold: float
    unit: str = "C"
    ambient: float | None = None
    # the given ambient is right to within +- this (item unit; sd this / sqrt 3); None: the
    # forecast's default doubt (AMBIENT_UNCERTAINTY, 1 sd, degC)
    ambient_within: float | None = None
    ambient_topic: str | None = None
    model: str = "lumped"
    window_s: float = 7200.0
    min_points: int = 8
    plausible: tuple[float, float] = (-100.0, 200.0)  # in the item's unit
    senml_name: str | None = None
    site: str | None = None
    limit: str = "auto"  # "upper" | "lower" | "auto" (the side the item's first reading is on)
    prior_class: str | None = None  # whose past episodes make the prior: None = the item's name
    lead_s: float = 1800.0
    hysteresis: float = 0.5
    hold_s: float = 300.0
    remind_every_s: float = 1800.0
    silence_s: float = 900.0
    horizon_s: float = 86400.0
    # A new approaching or crossed waits until its condition has held this long (an alarm delay:
    # an air probe by a busy door passes its limit for minutes at a time); 0: at once.
    delay_s: float = 0.0
    # The controller's defrost signal (daemon/ingest/defrost.py) and how long alerts wait after it.
    defrost_topic: str | None = None
    defrost_recovery_s: float = 1800.0
    defrost_max_s: float = 3600.0
    line: int = 0

    @property
    def is_pattern(self) -> bool:
        return is_wildcard(self.topic)

    @property
    def threshold_c(self) -> float:
        return to_celsius(self.threshold, self.unit)

    @property
    def ambient_c(self) -> float | None:
        return None if self.ambient is None else to_celsius(self.ambient, self.unit)

    @property
    def ambient_sd_c(self) -> float | None:
        """The given ambient's doubt as a sd in degC (None: the forecast's default)."""
        if self.ambient_within is None:
            return None
        from thermeta.daemon.units import scale_to_celsius
        from thermeta.predictors.forecast import ambient_sd_within

        return ambient_sd_within(scale_to_celsius(self.ambient_within, self.unit))

    @property
    def plausible_c(self) -> tuple[float, float]:
        lo, hi = (to_celsius(v, self.unit) for v in self.plausible)
        return (min(lo, hi), max(lo, hi))


@dataclass(frozen=True)
class HookConfig:
    """One ``[[hook]]``; the fields used depend on ``kind``."""

    kind: str
    line: int = 0
    name: str | None = None
    items: tuple[str, ...] | None = None
    levels: tuple[str, ...] | None = None
    url: str | None = None
    headers: dict[str, str] = field(default_factory=dict)
    body_template: str | None = None
    token_env: str | None = None
    host: str | None = None
    port: int | None = None
    tls: str = "starttls"
    username_env: str | None = None
    password_env: str | None = None
    from_addr: str | None = None
    to: tuple[str, ...] = ()
    command: tuple[str, ...] = ()
    timeout_s: float = 10.0
    topic_prefix: str = "thermeta/alert"


@dataclass(frozen=True)
class Config:
    path: str
    broker: BrokerConfig
    storage: StorageConfig
    fit: FitConfig
    publish: PublishConfig
    ingest: IngestConfig
    alerts: AlertDefaults
    items: tuple[ItemConfig, ...]
    hooks: tuple[HookConfig, ...]
    log_level: str = "info"

    @staticmethod
    def secret(env_name: str | None) -> str | None:
        """The value of a secret's environment variable (None when unnamed or unset)."""
        return os.environ.get(env_name) if env_name else None


# ---------------------------------------------------------------------------------------------
class _LineIndex:
    """Where each table and key of a TOML text starts: path tuple -> line number (1-based).

    Paths look like ("broker", "port") or ("item", 2, "threshold") for array-of-tables entries.
    """

    HEADER = re.compile(r"^\s*(\[\[?)\s*([^\]]+?)\s*\]\]?\s*(#.*)?$")
    KEY = re.compile(r"""^\s*([A-Za-z0-9_\-."' ]+?)\s*=""")

    def __init__(self, text: str):
        self.lines: dict[tuple, int] = {}
        counts: dict[str, int] = {}
        table: tuple = ()
        in_multiline: str | None = None
        for no, line in enumerate(text.splitlines(), start=1):
            if in_multiline:
                if line.count(in_multiline) % 2 == 1:
                    in_multiline = None
                continue
            m = self.HEADER.match(line)
            if m:
                name = m.group(2).strip().strip('"')
                if m.group(1) == "[[":
                    counts[name] = counts.get(name, -1) + 1
                    table = (name, counts[name])
                else:
                    table = tuple(name.split("."))
                self.lines.setdefault(table, no)
                continue
            m = self.KEY.match(line)
            if m:
                key = tuple(p.strip().strip('"').strip("'") for p in m.group(1).split("."))
                self.lines.setdefault(table + key, no)
                for q in ('"""', "'''"):
                    if line.count(q) % 2 == 1:
                        in_multiline = q

    def line(self, path: tuple) -> int:
        p = tuple(path)
        while p:
            if p in self.lines:
                return self.lines[p]
            p = p[:-1]
        return 1


class _Checker:
    """Collects problems while reading values out of the parsed TOML."""

    def __init__(self, path: str, index: _LineIndex):
        self.path = path
        self.index = index
        self.problems: list[str] = []

    def problem(self, where: tuple, key: str, text: str) -> None:
        self.problems.append(f"{self.path}:{self.index.line(where)}: {key}: {text}")

    @staticmethod
    def label(where: tuple) -> str:
        return ".".join(str(p) for p in where if not isinstance(p, int))

    def table(self, data: dict, name: str, allowed: set[str]) -> dict:
        value = data.get(name, {})
        if not isinstance(value, dict):
            self.problem((name,), name, f"must be a table [{name}], got {_show(value)}")
            return {}
        self.unknown(value, (name,), allowed)
        return value

    def unknown(self, tbl: dict, where: tuple, allowed: set[str]) -> None:
        for key in tbl:
            if key not in allowed:
                hint = _closest(key, allowed)
                self.problem(
                    where + (key,),
                    self.label(where + (key,)),
                    "unknown key" + (f" (did you mean '{hint}'?)" if hint else ""),
                )

    def get(
        self,
        tbl: dict,
        where: tuple,
        key: str,
        kind: str,
        default: Any = None,
        *,
        required: bool = False,
        positive: bool = False,
        choices: tuple = (),
        minimum: float | None = None,
    ) -> Any:
        lbl = self.label(where + (key,))
        if key not in tbl:
            if required:
                self.problem(where, lbl, "missing (required)")
            return default
        v = tbl[key]
        ok = {
            "str": isinstance(v, str),
            "int": isinstance(v, int) and not isinstance(v, bool),
            "num": isinstance(v, (int, float)) and not isinstance(v, bool),
            "bool": isinstance(v, bool),
            "strlist": isinstance(v, list) and all(isinstance(s, str) for s in v),
        }[kind]
        if not ok:
            want = {
                "str": "a string",
                "int": "an integer",
                "num": "a number",
                "bool": "true or false",
                "strlist": "a list of strings",
            }[kind]
            self.problem(where + (key,), lbl, f"must be {want}, got {_show(v)}")
            return default
        if kind == "num" and not math.isfinite(v):
            self.problem(where + (key,), lbl, f"must be a finite number, got {v}")
            return default
        if kind == "str" and not v.strip():
            self.problem(where + (key,), lbl, "must not be empty")
            return default
        if choices and v not in choices:
            self.problem(
                where + (key,),
                lbl,
                f"must be one of {', '.join(map(str, choices))}, got {_show(v)}",
            )
            return default
        if positive and not v > 0:
            self.problem(where + (key,), lbl, f"must be > 0, got {v}")
            return default
        if minimum is not None and v < minimum:
            self.problem(where + (key,), lbl, f"must be >= {minimum:g}, got {v}")
            return default
        return v


def _show(v: Any) -> str:
    if isinstance(v, str):
        return f'"{v}"'
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, dict):
        return "a table"
    if isinstance(v, list):
        return "a list"
    return str(v)


def _closest(key: str, allowed: set[str]) -> str | None:
    import difflib

    hits = difflib.get_close_matches(key, sorted(allowed), n=1, cutoff=0.75)
    return hits[0] if hits else None


ALERT_KEYS = {
    "lead": "lead_s",
    "hysteresis": "hysteresis",
    "hold": "hold_s",
    "remind_every": "remind_every_s",
    "silence": "silence_s",
    "horizon": "horizon_s",
    "delay": "delay_s",
}


def _alert_values(
    c: _Checker, tbl: dict, where: tuple, defaults: AlertDefaults
) -> dict[str, float]:
    out = {}
    for key, attr in ALERT_KEYS.items():
        dflt = getattr(defaults, attr)
        if key in ("hysteresis", "delay"):
            out[attr] = float(c.get(tbl, where, key, "num", dflt, minimum=0))
        else:
            out[attr] = float(c.get(tbl, where, key, "num", dflt, positive=True))
    return out


def load_config(path: str | Path) -> Config:
    """Read and validate ``path``; raise ConfigError listing every problem."""
    name = str(path)
    try:
        raw = Path(path).read_bytes()
    except FileNotFoundError:
        raise ConfigError([f"{name}:1: file: no such file"]) from None
    except OSError as exc:
        raise ConfigError([f"{name}:1: file: cannot read: {exc.strerror or exc}"]) from None
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        line = raw[: exc.start].count(b"\n") + 1
        raise ConfigError([f"{name}:{line}: file: not UTF-8 text"]) from None
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        msg = str(exc)
        m = re.search(r"\(at line (\d+), column (\d+)\)", msg)
        where = m.group(1) if m else "1"
        detail = re.sub(r"\s*\(at line \d+, column \d+\)", "", msg) or "invalid TOML"
        raise ConfigError([f"{name}:{where}: toml: {detail}"]) from None
    return parse_config(data, name, text)


def parse_config(data: dict, name: str, text: str) -> Config:
    c = _Checker(name, _LineIndex(text))
    c.unknown(
        data, (), {"broker", "storage", "fit", "publish", "ingest", "alerts", "log", "item", "hook"}
    )
    broker = _broker(
        c,
        c.table(
            data,
            "broker",
            set(BrokerConfig.__dataclass_fields__) - {"keepalive_s", "session_expiry_s"}
            | {"keepalive", "session_expiry"},
        ),
    )
    storage = _storage(
        c, c.table(data, "storage", {"url", "url_env", "retention_days", "batch_size", "batch_ms"})
    )
    fit = _fit(c, c.table(data, "fit", {"refit_every", "window", "min_points", "model"}))
    publish = _publish(
        c, c.table(data, "publish", {"topic_prefix", "status_topic", "qos", "retain"})
    )
    ingest = _ingest(
        c, c.table(data, "ingest", {"max_payload_bytes", "max_future", "dead_letter_chars"})
    )
    alerts_tbl = c.table(data, "alerts", set(ALERT_KEYS))
    alerts = AlertDefaults(**_alert_values(c, alerts_tbl, ("alerts",), AlertDefaults()))
    log_tbl = c.table(data, "log", {"level"})
    level = c.get(
        log_tbl, ("log",), "level", "str", "info", choices=("debug", "info", "warning", "error")
    )
    items = _items(c, data.get("item", []), fit, alerts, publish)
    hooks = _hooks(c, data.get("hook", []))
    if c.problems:
        raise ConfigError(c.problems)
    return Config(
        path=name,
        broker=broker,
        storage=storage,
        fit=fit,
        publish=publish,
        ingest=ingest,
        alerts=alerts,
        items=tuple(items),
        hooks=tuple(hooks),
        log_level=level,
    )


def _broker(c: _Checker, t: dict) -> BrokerConfig:
    w = ("broker",)
    tls = c.get(t, w, "tls", "bool", False)
    files = {k: c.get(t, w, k, "str") for k in ("ca_file", "cert_file", "key_file")}
    for k, v in files.items():
        if v is not None and not Path(v).is_file():
            c.problem(w + (k,), f"broker.{k}", f"no such file: {v}")
    if files["ca_file"] or files["cert_file"]:
        tls = True
    if files["key_file"] and not files["cert_file"]:
        c.problem(w + ("key_file",), "broker.key_file", "needs broker.cert_file too")
    port = c.get(t, w, "port", "int", 8883 if tls else 1883)
    if not 0 < port < 65536:
        c.problem(w + ("port",), "broker.port", f"must be 1-65535, got {port}")
    password_env = c.get(t, w, "password_env", "str")
    password = None
    if "password" in t:
        c.problem(
            w + ("password",),
            "broker.password",
            "put the password in an environment variable and name it with password_env",
        )
    if password_env:
        password = os.environ.get(password_env)
        if password is None:
            c.problem(
                w + ("password_env",),
                "broker.password_env",
                f"environment variable {password_env} is not set",
            )
    username = c.get(t, w, "username", "str")
    if password_env and not username:
        c.problem(w + ("password_env",), "broker.username", "missing (a password needs a username)")
    client_id = c.get(t, w, "client_id", "str", f"thermeta-{socket.gethostname()}"[:64])
    return BrokerConfig(
        host=c.get(t, w, "host", "str", "127.0.0.1"),
        port=port,
        client_id=client_id,
        protocol=str(c.get(t, w, "protocol", "str", "auto", choices=PROTOCOLS)),
        keepalive_s=c.get(t, w, "keepalive", "int", 60, positive=True),
        session_expiry_s=c.get(t, w, "session_expiry", "int", 7 * 86400, positive=True),
        qos=c.get(t, w, "qos", "int", 1, choices=(0, 1)),
        receive_maximum=_receive_max(c, t, w),
        username=username,
        password_env=password_env,
        password=password,
        tls=tls,
        ca_file=files["ca_file"],
        cert_file=files["cert_file"],
        key_file=files["key_file"],
        tls_insecure=c.get(t, w, "tls_insecure", "bool", False),
    )


def _receive_max(c: _Checker, t: dict, w: tuple) -> int:
    v = c.get(t, w, "receive_maximum", "int", 1000, positive=True)
    if v > 65535:
        c.problem(w + ("receive_maximum",), "broker.receive_maximum", f"must be 1-65535, got {v}")
        return 1000
    return v


def _storage(c: _Checker, t: dict) -> StorageConfig:
    w = ("storage",)
    url = c.get(t, w, "url", "str", "sqlite:///thermeta.db")
    url_env = c.get(t, w, "url_env", "str")
    if url_env:
        if "url" in t:
            c.problem(w + ("url_env",), "storage.url_env", "give url or url_env, not both")
        url = os.environ.get(url_env)
        if url is None:
            c.problem(
                w + ("url_env",), "storage.url_env", f"environment variable {url_env} is not set"
            )
            url = "sqlite:///thermeta.db"
    if not re.match(r"^[A-Za-z][A-Za-z0-9+]*://", url or ""):
        c.problem(
            w + ("url",),
            "storage.url",
            "must be a database URL such as sqlite:///thermeta.db or "
            "postgresql+psycopg://user@host/db",
        )
    return StorageConfig(
        url=url,
        retention_days=float(c.get(t, w, "retention_days", "num", 90.0, minimum=0)),
        batch_size=c.get(t, w, "batch_size", "int", 500, positive=True),
        batch_ms=c.get(t, w, "batch_ms", "int", 200, positive=True),
    )


def _fit(c: _Checker, t: dict) -> FitConfig:
    w = ("fit",)
    return FitConfig(
        refit_every_s=float(c.get(t, w, "refit_every", "num", 30.0, positive=True)),
        window_s=float(c.get(t, w, "window", "num", 7200.0, positive=True)),
        min_points=c.get(t, w, "min_points", "int", 8, minimum=3),
        model=c.get(t, w, "model", "str", "lumped", choices=MODELS),
    )


def _publish(c: _Checker, t: dict) -> PublishConfig:
    w = ("publish",)
    out = PublishConfig(
        topic_prefix=c.get(t, w, "topic_prefix", "str", "thermeta/forecast").rstrip("/"),
        status_topic=c.get(t, w, "status_topic", "str", "thermeta/status"),
        qos=c.get(t, w, "qos", "int", 1, choices=(0, 1)),
        retain=c.get(t, w, "retain", "bool", True),
    )
    for key in ("topic_prefix", "status_topic"):
        if any(ch in getattr(out, key) for ch in "+#"):
            c.problem(w + (key,), f"publish.{key}", "must not contain the wildcards + or #")
    return out


def _ingest(c: _Checker, t: dict) -> IngestConfig:
    w = ("ingest",)
    return IngestConfig(
        max_payload_bytes=c.get(t, w, "max_payload_bytes", "int", 16384, positive=True),
        max_future_s=float(c.get(t, w, "max_future", "num", 300.0, minimum=0)),
        dead_letter_chars=c.get(t, w, "dead_letter_chars", "int", 500, positive=True),
    )


ITEM_KEYS = {
    "name",
    "topic",
    "threshold",
    "unit",
    "ambient",
    "ambient_within",
    "ambient_topic",
    "model",
    "window",
    "min_points",
    "plausible",
    "senml_name",
    "site",
    "limit",
    "prior_class",
    "defrost_topic",
    "defrost_recovery",
    "defrost_max",
} | set(ALERT_KEYS)


def _items(
    c: _Checker, raw: Any, fit: FitConfig, alerts: AlertDefaults, publish: PublishConfig
) -> list[ItemConfig]:
    if not isinstance(raw, list):
        c.problem(("item",), "item", "must be [[item]] tables")
        return []
    if not raw:
        c.problem((), "item", "no [[item]] tables: add at least one item to watch")
    out: list[ItemConfig] = []
    names: dict[str, int] = {}
    topics: dict[str, int] = {}
    for i, t in enumerate(raw):
        w = ("item", i)
        if not isinstance(t, dict):
            c.problem(w, "item", "must be a table")
            continue
        c.unknown(t, w, ITEM_KEYS)
        n_problems = len(c.problems)
        name = c.get(t, w, "name", "str", required=True)
        topic = c.get(t, w, "topic", "str", required=True)
        threshold = c.get(t, w, "threshold", "num", required=True)
        unit = c.get(t, w, "unit", "str", "C", choices=UNITS)
        ambient = c.get(t, w, "ambient", "num")
        ambient_topic = c.get(t, w, "ambient_topic", "str")
        if ambient is not None and ambient_topic is not None:
            c.problem(
                w + ("ambient_topic",),
                "item.ambient_topic",
                "give ambient (known) or ambient_topic (measured), not both",
            )
        ambient_within = c.get(t, w, "ambient_within", "num", minimum=0)
        if ambient_within is not None and ambient is None:
            c.problem(
                w + ("ambient_within",),
                "item.ambient_within",
                "says how far off the given ambient may be: give ambient too",
            )
        if topic is not None:
            err = check_filter(topic)
            if err:
                c.problem(w + ("topic",), "item.topic", err)
            elif topic in topics:
                c.problem(
                    w + ("topic",),
                    "item.topic",
                    f"already used by the item on line {topics[topic]}",
                )
            else:
                topics[topic] = c.index.line(w + ("topic",))
        if ambient_topic is not None:
            err = check_filter(ambient_topic)
            if err:
                c.problem(w + ("ambient_topic",), "item.ambient_topic", err)
            elif topic and is_wildcard(ambient_topic) != is_wildcard(topic):
                c.problem(
                    w + ("ambient_topic",),
                    "item.ambient_topic",
                    "must use wildcards exactly when topic does",
                )
        defrost = _defrost(c, t, w, topic, ambient_topic)
        if name is not None:
            _check_name(c, w, name, topic, ambient_topic)
            if name in names:
                c.problem(
                    w + ("name",), "item.name", f"already used by the item on line {names[name]}"
                )
            else:
                names[name] = c.index.line(w + ("name",))
        plausible = (-100.0, 200.0) if unit == "C" else None
        if "plausible" in t:
            p = t["plausible"]
            if (
                isinstance(p, list)
                and len(p) == 2
                and all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in p)
                and p[0] < p[1]
            ):
                plausible = (float(p[0]), float(p[1]))
            else:
                c.problem(
                    w + ("plausible",),
                    "item.plausible",
                    f"must be [low, high] with low < high, got {_show(p)}",
                )
        if plausible is None:
            from thermeta.daemon.units import from_celsius

            plausible = (from_celsius(-100.0, unit or "C"), from_celsius(200.0, unit or "C"))
        values = _alert_values(c, t, w, alerts)
        item = ItemConfig(
            name=name or "",
            topic=topic or "",
            threshold=float(threshold or 0.0),
            unit=unit or "C",
            ambient=None if ambient is None else float(ambient),
            ambient_topic=ambient_topic,
            ambient_within=None if ambient_within is None else float(ambient_within),
            model=c.get(t, w, "model", "str", fit.model, choices=MODELS),
            window_s=float(c.get(t, w, "window", "num", fit.window_s, positive=True)),
            min_points=c.get(t, w, "min_points", "int", fit.min_points, minimum=3),
            plausible=plausible,
            senml_name=c.get(t, w, "senml_name", "str"),
            site=c.get(t, w, "site", "str"),
            limit=c.get(t, w, "limit", "str", "auto", choices=("upper", "lower", "auto")),
            prior_class=_prior_class(c, t, w),
            line=c.index.line(w),
            **values,
            **defrost,
        )
        if len(c.problems) == n_problems:
            lo, hi = item.plausible
            if not lo <= item.threshold <= hi:
                c.problem(
                    w + ("threshold",),
                    "item.threshold",
                    f"{item.threshold:g} is outside the plausible range [{lo:g}, {hi:g}]",
                )
        out.append(item)
    return out


def _defrost(
    c: _Checker, t: dict, w: tuple, topic: str | None, ambient_topic: str | None
) -> dict[str, Any]:
    """defrost_topic (a topic of its own, with wildcards exactly when topic has them),
    defrost_recovery (seconds, >= 0) and defrost_max (seconds, > 0); the delays only with a
    topic."""
    dtopic = c.get(t, w, "defrost_topic", "str")
    if dtopic is not None:
        err = check_filter(dtopic)
        if err:
            c.problem(w + ("defrost_topic",), "item.defrost_topic", err)
        elif dtopic in (topic, ambient_topic):
            c.problem(
                w + ("defrost_topic",),
                "item.defrost_topic",
                "must differ from topic and ambient_topic (it carries on/off, not readings)",
            )
        elif topic and is_wildcard(dtopic) != is_wildcard(topic):
            c.problem(
                w + ("defrost_topic",),
                "item.defrost_topic",
                "must use wildcards exactly when topic does",
            )
    else:
        for key in ("defrost_recovery", "defrost_max"):
            if key in t:
                c.problem(
                    w + (key,), f"item.{key}", "needs defrost_topic (the controller's signal)"
                )
    return {
        "defrost_topic": dtopic,
        "defrost_recovery_s": float(c.get(t, w, "defrost_recovery", "num", 1800.0, minimum=0)),
        "defrost_max_s": float(c.get(t, w, "defrost_max", "num", 3600.0, positive=True)),
    }


def _prior_class(c: _Checker, t: dict, w: tuple) -> str | None:
    """prior_class: a non-empty name of at most 200 characters (the store's key), or absent."""
    v = c.get(t, w, "prior_class", "str")
    if v is not None and not 0 < len(v.strip()) <= 200:
        c.problem(
            w + ("prior_class",),
            "item.prior_class",
            f"must be a name of 1-200 characters, got {_show(v)}",
        )
        return None
    return None if v is None else v.strip()


def _check_name(
    c: _Checker, w: tuple, name: str, topic: str | None, ambient_topic: str | None
) -> None:
    if not NAME_RE.match(name) or name.startswith("/") or name.endswith("/"):
        c.problem(
            w + ("name",), "item.name", f"{_show(name)}: use letters, digits and . _ - : / only"
        )
        return
    if name.endswith(AMBIENT_SUFFIX):
        c.problem(
            w + ("name",),
            "item.name",
            f"must not end in '{AMBIENT_SUFFIX}' (kept for ambient probes)",
        )
    if name.endswith(DEFROST_SUFFIX):
        c.problem(
            w + ("name",),
            "item.name",
            f"must not end in '{DEFROST_SUFFIX}' (kept for defrost signals)",
        )
    used = placeholders(name)
    if used is None:
        c.problem(w + ("name",), "item.name", "braces must hold a topic level number such as {2}")
        return
    if topic is None or check_filter(topic):
        return
    levels = topic.split("/")
    if is_wildcard(topic):
        wild = {i + 1 for i, lv in enumerate(levels) if lv in ("+", "#")}
        if not used & wild:
            c.problem(
                w + ("name",),
                "item.name",
                "a wildcard topic needs a name template using a wildcard level, e.g. "
                f"{{{min(wild)}}} for level {min(wild)} of {topic}",
            )
        has_hash = levels[-1] == "#"
        for n in used:
            if n > len(levels) and not has_hash:
                c.problem(
                    w + ("name",), "item.name", f"{{{n}}}: the topic has only {len(levels)} levels"
                )
        if ambient_topic and is_wildcard(ambient_topic):
            alevels = ambient_topic.split("/")
            for n in sorted(used & wild):
                if levels[n - 1] == "+" and (n > len(alevels) or alevels[n - 1] != "+"):
                    c.problem(
                        w + ("ambient_topic",),
                        "item.ambient_topic",
                        f"level {n} must be a + wildcard like in topic, so {{{n}}} names both",
                    )
                    break
    elif used:
        c.problem(w + ("name",), "item.name", "placeholders such as {2} need a wildcard topic")


HOOK_KEYS = {
    "webhook": {"url", "headers", "body_template", "token_env", "timeout"},
    "email": {"host", "port", "tls", "username_env", "password_env", "from", "to", "timeout"},
    "exec": {"command", "timeout"},
    "mqtt": {"topic_prefix"},
}


def _hooks(c: _Checker, raw: Any) -> list[HookConfig]:
    if not isinstance(raw, list):
        c.problem(("hook",), "hook", "must be [[hook]] tables")
        return []
    out = []
    for i, t in enumerate(raw):
        w = ("hook", i)
        if not isinstance(t, dict):
            c.problem(w, "hook", "must be a table")
            continue
        kind = c.get(t, w, "kind", "str", required=True, choices=HOOK_KINDS)
        if kind is None:
            continue
        c.unknown(t, w, {"kind", "name", "items", "levels"} | HOOK_KEYS[kind])
        items = c.get(t, w, "items", "strlist")
        levels = c.get(t, w, "levels", "strlist")
        for lv in levels or ():
            if lv not in ALERT_LEVELS:
                c.problem(
                    w + ("levels",),
                    "hook.levels",
                    f"unknown level {_show(lv)} (one of {', '.join(ALERT_LEVELS)})",
                )
        kw: dict[str, Any] = {}
        if kind == "webhook":
            url = c.get(t, w, "url", "str", required=True)
            if url and not re.match(r"^https?://[^/\s]+", url):
                c.problem(
                    w + ("url",),
                    "hook.url",
                    f"must be an http:// or https:// URL, got {_show(url)}",
                )
            headers = t.get("headers", {})
            if not (
                isinstance(headers, dict) and all(isinstance(v, str) for v in headers.values())
            ):
                c.problem(w + ("headers",), "hook.headers", "must be a table of strings")
                headers = {}
            kw.update(
                url=url,
                headers=dict(headers),
                body_template=c.get(t, w, "body_template", "str"),
                token_env=_env_key(c, t, w, "token_env"),
            )
        elif kind == "email":
            kw.update(
                host=c.get(t, w, "host", "str", required=True),
                tls=c.get(t, w, "tls", "str", "starttls", choices=TLS_MODES),
                username_env=_env_key(c, t, w, "username_env"),
                password_env=_env_key(c, t, w, "password_env"),
                from_addr=c.get(t, w, "from", "str", required=True),
            )
            default_port = {"starttls": 587, "implicit": 465, "none": 25}.get(kw["tls"] or "", 587)
            kw["port"] = c.get(t, w, "port", "int", default_port, positive=True)
            to = t.get("to")
            if isinstance(to, str) and to.strip():
                kw["to"] = (to,)
            elif isinstance(to, list) and to and all(isinstance(s, str) and s.strip() for s in to):
                kw["to"] = tuple(to)
            else:
                c.problem(
                    w + ("to",) if "to" in t else w,
                    "hook.to",
                    "missing (required)" if to is None else "must be an address or a list of them",
                )
            for k in ("from",):
                v = t.get(k)
                if isinstance(v, str) and "@" not in v:
                    c.problem(w + (k,), f"hook.{k}", f"not an email address: {_show(v)}")
        elif kind == "exec":
            cmd = None
            if isinstance(t.get("command"), str):
                c.problem(
                    w + ("command",),
                    "hook.command",
                    'must be a list such as ["/usr/local/bin/prog", "arg"] (no shell is used)',
                )
            else:
                cmd = c.get(t, w, "command", "strlist", required=True)
            if cmd is not None and not cmd:
                c.problem(w + ("command",), "hook.command", "must not be empty")
            kw["command"] = tuple(cmd or ())
        elif kind == "mqtt":
            prefix = c.get(t, w, "topic_prefix", "str", "thermeta/alert")
            if any(ch in prefix for ch in "+#"):
                c.problem(w + ("topic_prefix",), "hook.topic_prefix", "must not contain + or #")
            kw["topic_prefix"] = prefix.rstrip("/")
        if "timeout" in HOOK_KEYS[kind]:
            kw["timeout_s"] = float(c.get(t, w, "timeout", "num", 10.0, positive=True))
        out.append(
            HookConfig(
                kind=kind,
                line=c.index.line(w),
                name=c.get(t, w, "name", "str"),
                items=tuple(items) if items is not None else None,
                levels=tuple(levels) if levels is not None else None,
                **kw,
            )
        )
    return out


def _env_key(c: _Checker, t: dict, w: tuple, key: str) -> str | None:
    env = c.get(t, w, key, "str")
    if env and env not in os.environ:
        c.problem(w + (key,), f"hook.{key}", f"environment variable {env} is not set")
    return env
