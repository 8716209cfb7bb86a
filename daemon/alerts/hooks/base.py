"""The one base of every alert hook and of its ``[[hook]]`` table, and the table of kinds.

A hook takes one alert (the JSON dict of :mod:`thermeta.daemon.alerts.message`) and delivers it,
or raises :class:`~thermeta.storage.errors.DeliveryError`; the outbox worker retries it later.
Hooks never run on the ingest or refit threads: each has its own outbox worker.

Each kind is one module beside this one: its config model (a :class:`HookConfig` with the
kind's own keys) and its :class:`Hook`, which names that model.  ``hooks/__init__.py`` puts every
kind in :data:`KINDS`, where the config loader and :func:`make_hook` find them.
"""

from __future__ import annotations

import fnmatch
from abc import ABC, abstractmethod
from collections.abc import Callable
from typing import Any, ClassVar, Generic, TypeVar

from pydantic import Field
from thermeta.daemon.settings.checks import Checks, Positive, Table, Text, Texts, show
from thermeta.daemon.states import Event

Publish = Callable[..., Any]
PngFor = Callable[[dict[str, Any]], bytes | None]


class HookConfig(Table):
    """What every ``[[hook]]`` has: its kind, a name, and filters by item and event."""

    kind: str
    name: Text | None = None  # the hook's name in the outbox; default kind-position
    items: Texts | None = None  # item names, * and ? allowed; None: every item
    events: Texts | None = None  # alert events; None: every event

    refused: ClassVar[dict[str, str]] = {
        "levels": "renamed to events (an alert's event: approaching, crossed, late, ...)"
    }

    def check(self, checks: Checks) -> None:
        for ev in self.events or ():
            if ev not in tuple(Event):
                checks.add("events", f"unknown event {show(ev)} (one of {', '.join(Event)})")


class TimedHookConfig(HookConfig):
    """A hook that waits for its receiver: at most ``timeout`` seconds a delivery."""

    timeout_s: Positive = Field(10.0, validation_alias="timeout")


C = TypeVar("C", bound=HookConfig)


class Hook(ABC, Generic[C]):
    kind: ClassVar[str]
    config: ClassVar[type[HookConfig]]  # the kind's [[hook]] table

    def __init__(
        self,
        cfg: C,
        key: str,
        *,
        publish: Publish | None = None,
        png_for: PngFor | None = None,
    ):
        self.cfg = cfg
        self.key = key
        self.publish = publish  # the service's MQTT publish (the mqtt kind uses it)
        self.png_for = png_for  # the item's picture for an alert (the email kind attaches it)

    def wants(self, alert: dict[str, Any]) -> bool:
        """Whether this hook is limited to other items or events (item names may use * and ?)."""
        items, events = self.cfg.items, self.cfg.events
        if items is not None and not any(fnmatch.fnmatchcase(alert["item"], pat) for pat in items):
            return False
        return events is None or alert["event"] in events

    @abstractmethod
    def deliver(self, alert: dict[str, Any]) -> None:
        """Send ``alert``; raise DeliveryError when it did not arrive."""

    def close(self) -> None:
        """Release what the hook holds (nothing by default)."""
        return None

    def __repr__(self) -> str:
        return f"<{self.__class__.__name__} {self.key}>"


# kind -> its Hook class, in the order the config's messages list them (hooks/__init__.py)
KINDS: dict[str, type[Hook[Any]]] = {}


def hook_key(index: int, cfg: HookConfig) -> str:
    """The hook's name in the outbox: its ``name`` or kind and position, e.g. ``webhook-1``."""
    return cfg.name or f"{cfg.kind}-{index + 1}"


def make_hook(
    index: int,
    cfg: HookConfig,
    *,
    publish: Publish | None = None,
    png_for: PngFor | None = None,
) -> Hook[Any]:
    """The hook of the ``index``-th ``[[hook]]`` table."""
    return KINDS[cfg.kind](cfg, hook_key(index, cfg), publish=publish, png_for=png_for)
