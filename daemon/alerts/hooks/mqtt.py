"""``kind = "mqtt"``: publish the alert JSON to ``<topic_prefix>/<item>`` (QoS 1, not retained)
through the daemon's own broker connection."""

from __future__ import annotations

import json
from collections.abc import Callable
from typing import Any

from thermeta.daemon.alerts.hooks.base import Hook
from thermeta.storage.errors import DeliveryError

PUBLISH_WAIT_S = 10.0


class MqttHook(Hook):
    kind = "mqtt"

    def __init__(self, cfg: Any, key: str, publish: Callable[..., Any] | None = None):
        super().__init__(cfg, key)
        self.publish = publish

    def topic(self, alert: dict[str, Any]) -> str:
        return f"{self.cfg.topic_prefix}/{alert['item']}"

    def deliver(self, alert: dict[str, Any]) -> None:
        if self.publish is None:
            raise DeliveryError(f"{self.key}: no broker connection to publish on")
        try:
            info = self.publish(self.topic(alert), json.dumps(alert), qos=1, retain=False)
            if info is not None and hasattr(info, "wait_for_publish"):
                # Called from the hook's own worker thread, never from a paho callback.
                info.wait_for_publish(PUBLISH_WAIT_S)
                if not info.is_published():
                    raise DeliveryError(f"{self.key}: the broker did not confirm the publish")
        except (RuntimeError, ValueError, OSError) as exc:
            raise DeliveryError(f"{self.key}: publish failed: {exc}") from exc
