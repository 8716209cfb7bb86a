"""Alert hooks: one module per kind beside their common base (``base.py``).

Each kind's module holds its ``[[hook]]`` table (a config model) and its :class:`Hook`.  To add a
kind, write its module and list its hook below.
"""

from thermeta.daemon.alerts.hooks.base import KINDS, Hook, HookConfig, hook_key, make_hook
from thermeta.daemon.alerts.hooks.email import EmailHook
from thermeta.daemon.alerts.hooks.exec import ExecHook
from thermeta.daemon.alerts.hooks.mqtt import MqttHook
from thermeta.daemon.alerts.hooks.webhook import WebhookHook

for _hook in (WebhookHook, EmailHook, ExecHook, MqttHook):  # the order messages list them in
    KINDS[_hook.kind] = _hook

__all__ = ["KINDS", "Hook", "HookConfig", "hook_key", "make_hook"]
