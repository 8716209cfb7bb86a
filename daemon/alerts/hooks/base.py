"""The one base of every alert hook, and the factory from ``[[hook]]`` tables.

A hook takes one alert (the JSON dict of :mod:`thermeta.daemon.alerts.message`) and delivers it,
or raises :class:`~thermeta.storage.errors.DeliveryError`; the outbox worker retries it later.
Hooks never run on the ingest or refit threads: each has its own outbox worker.
"""

from __future__ import annotations

import fnmatch
from abc import ABC, abstractmethod
from collections.abc import Callable
from typing import Any

from thermeta.storage.errors import DeliveryError

__all__ = ["DeliveryError", "Hook", "hook_key", "make_hook"]


class Hook(ABC):
    kind = "hook"

    def __init__(self, cfg: Any, key: str):
        self.cfg = cfg
        self.key = key

    def wants(self, alert: dict[str, Any]) -> bool:
        """Whether this hook is limited to other items or levels (item names may use * and ?)."""
        items = getattr(self.cfg, "items", None)
        levels = getattr(self.cfg, "levels", None)
        if items is not None and not any(fnmatch.fnmatchcase(alert["item"], pat) for pat in items):
            return False
        return levels is None or alert["level"] in levels

    @abstractmethod
    def deliver(self, alert: dict[str, Any]) -> None:
        """Send ``alert``; raise DeliveryError when it did not arrive."""

    def close(self) -> None:
        """Release what the hook holds (nothing by default)."""
        return None

    def __repr__(self) -> str:
        return f"<{self.__class__.__name__} {self.key}>"


def hook_key(index: int, cfg: Any) -> str:
    """The hook's name in the outbox: its ``name`` or kind and position, e.g. ``webhook-1``."""
    return cfg.name or f"{cfg.kind}-{index + 1}"


def make_hook(
    index: int,
    cfg: Any,
    *,
    publish: Callable[..., Any] | None = None,
    png_for: Callable[[dict[str, Any]], bytes | None] | None = None,
) -> Hook:
    key = hook_key(index, cfg)
    if cfg.kind == "webhook":
        from thermeta.daemon.alerts.hooks.webhook import WebhookHook

        return WebhookHook(cfg, key)
    if cfg.kind == "email":
        from thermeta.daemon.alerts.hooks.email import EmailHook

        return EmailHook(cfg, key, png_for=png_for)
    if cfg.kind == "exec":
        from thermeta.daemon.alerts.hooks.exec import ExecHook

        return ExecHook(cfg, key)
    if cfg.kind == "mqtt":
        from thermeta.daemon.alerts.hooks.mqtt import MqttHook

        return MqttHook(cfg, key, publish=publish)
    raise ValueError(f"unknown hook kind {cfg.kind!r}")
