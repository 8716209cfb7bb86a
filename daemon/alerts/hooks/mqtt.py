"""``kind = "mqtt"``: publish the alert JSON to ``<topic_prefix>/<item>`` (QoS 1, not retained)
through the daemon's own broker connection."""

from __future__ import annotations

import json
from typing import Annotated, Any, Literal

from pydantic import AfterValidator
from thermeta.daemon.alerts.hooks.base import Hook, HookConfig
from thermeta.daemon.settings.checks import Text, problem
from thermeta.storage.errors import DeliveryError


def _no_wildcards(prefix: str) -> str:
    if any(ch in prefix for ch in "+#"):
        raise problem("must not contain + or #")
    return prefix.rstrip("/")


class MqttConfig(HookConfig):
    """``[[hook]]`` with ``kind = "mqtt"``."""

    kind: Literal["mqtt"] = "mqtt"
    topic_prefix: Annotated[Text, AfterValidator(_no_wildcards)] = "thermeta/alert"


PUBLISH_WAIT_S = 10.0


class MqttHook(Hook[MqttConfig]):
    kind = "mqtt"
    config = MqttConfig

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
