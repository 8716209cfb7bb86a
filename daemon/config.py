"""The config file: read, every table validated, one :class:`Config` out.

    cfg = load_config("site.toml")      # raises ConfigError listing every problem

Each table's keys, defaults and checks are declared once, in its model: the one-off tables and
``[[item]]`` in ``daemon/settings/``, each ``[[hook]]`` kind beside its hook in
``daemon/alerts/hooks/``.  Problems come as ``FILE:LINE: key: problem``, all of them at once
(:mod:`thermeta.daemon.settings.checks` says how).
"""

from __future__ import annotations

import re
import tomllib
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from thermeta.daemon.alerts.hooks import KINDS, HookConfig
from thermeta.daemon.ingest.topics import AMBIENT_SUFFIX, DEFROST_SUFFIX
from thermeta.daemon.settings.checks import Checks, Table, choice_problem, show
from thermeta.daemon.settings.items import ItemConfig
from thermeta.daemon.settings.sections import (
    AlertDefaults,
    AlertRules,
    BrokerConfig,
    FitConfig,
    FitRules,
    IngestConfig,
    LogConfig,
    PublishConfig,
    StorageConfig,
)
from thermeta.storage.errors import ConfigError

__all__ = [
    "AMBIENT_SUFFIX",
    "DEFROST_SUFFIX",
    "AlertDefaults",
    "BrokerConfig",
    "Config",
    "FitConfig",
    "HookConfig",
    "IngestConfig",
    "ItemConfig",
    "PublishConfig",
    "StorageConfig",
    "load_config",
    "parse_config",
]

SECTIONS: dict[str, type[Table]] = {
    "broker": BrokerConfig,
    "storage": StorageConfig,
    "fit": FitConfig,
    "publish": PublishConfig,
    "ingest": IngestConfig,
    "alerts": AlertDefaults,
    "log": LogConfig,
}
TOP_KEYS = (*SECTIONS, "item", "hook")


@dataclass(frozen=True)
class Config:
    """A whole, valid config file."""

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


def load_config(path: str | Path) -> Config:
    """Read and validate ``path``; raise ConfigError listing every problem."""
    name = str(path)
    try:
        raw = Path(path).read_bytes()
    except FileNotFoundError:
        raise ConfigError([f"{name}:1: file: no such file"]) from None
    except OSError as exc:
        raise ConfigError([f"{name}:1: file: cannot read: {exc.strerror or exc}"]) from exc
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        line = raw[: exc.start].count(b"\n") + 1
        raise ConfigError([f"{name}:{line}: file: not UTF-8 text"]) from exc
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        msg = str(exc)
        m = re.search(r"\(at line (\d+), column (\d+)\)", msg)
        where = m.group(1) if m else "1"
        detail = re.sub(r"\s*\(at line \d+, column \d+\)", "", msg) or "invalid TOML"
        raise ConfigError([f"{name}:{where}: toml: {detail}"]) from exc
    return parse_config(data, name, text)


def parse_config(data: dict[str, Any], name: str, text: str) -> Config:
    """The config in ``data`` (parsed from ``text`` of file ``name``)."""
    checks = Checks(name, text)
    for key in data:
        if key not in TOP_KEYS:
            checks.unknown(key, TOP_KEYS)
    tables: dict[str, Any] = {
        key: _table(checks, data, key, model) for key, model in SECTIONS.items()
    }
    items = _items(checks, data.get("item", []), tables["fit"], tables["alerts"])
    hooks = _hooks(checks, data.get("hook", []))
    if checks.problems:
        raise ConfigError(checks.problems)
    return Config(
        path=name,
        broker=tables["broker"],
        storage=tables["storage"],
        fit=tables["fit"],
        publish=tables["publish"],
        ingest=tables["ingest"],
        alerts=tables["alerts"],
        items=tuple(items),
        hooks=tuple(hooks),
        log_level=tables["log"].level,
    )


def _table(checks: Checks, data: dict[str, Any], key: str, model: type[Table]) -> Table:
    raw = data.get(key, {})
    if not isinstance(raw, dict):
        checks.table().add(key, f"must be a table [{key}], got {show(raw)}")
        raw = {}
    return model.model_validate(raw, context=checks.table(key))


def _list(checks: Checks, raw: Any, key: str) -> list[Any]:
    if isinstance(raw, list):
        return raw
    checks.table().add(key, f"must be [[{key}]] tables")
    return []


def _items(checks: Checks, raw: Any, fit: FitConfig, alerts: AlertDefaults) -> list[ItemConfig]:
    tables = _list(checks, raw, "item")
    if isinstance(raw, list) and not raw:
        checks.table().add("item", "no [[item]] tables: add at least one item to watch", at=())
    # an item's fit and alert keys default to [fit]'s and [alerts]'
    inherited = {
        key: getattr(section, name)
        for model, section in ((FitRules, fit), (AlertRules, alerts))
        for key, name in model.toml_keys().items()
    }
    out = []
    for i, t in enumerate(tables):
        if not isinstance(t, dict):
            checks.table().add("item", "must be a table", at=("item", i))
            continue
        t = {**inherited, **t}
        out.append(ItemConfig.model_validate(t, context=checks.table("item", i)))
    return out


def _hooks(checks: Checks, raw: Any) -> list[HookConfig]:
    out = []
    for i, t in enumerate(_list(checks, raw, "hook")):
        if not isinstance(t, dict):
            checks.table().add("hook", "must be a table", at=("hook", i))
            continue
        checks.table("hook", i)
        if "kind" not in t:
            checks.add("kind", "missing (required)", at=())
            continue
        why = choice_problem(t["kind"], tuple(KINDS))
        if why:
            checks.add("kind", why)
            continue
        out.append(KINDS[t["kind"]].config.model_validate(t, context=checks))
    return out
