"""Alerts: rules over each refit's forecast, one-sentence messages, delivery through an outbox.

    rules.py    the rule engine (pure: forecast dicts and a time in, events out)
    message.py  an alert as JSON and as one plain sentence with the numbers
    outbox.py   one worker thread per hook, retries with exponential backoff
    service.py  the plug-in the daemon attaches (listener + workers)
    hooks/      one module per delivery kind (webhook, email, exec, mqtt) beside their base

The daemon calls :func:`attach` once its store is open (see thermeta.daemon.service).
"""

from __future__ import annotations

from typing import Any


def attach(service: Any):
    """Build the alert plug-in for a running :class:`thermeta.daemon.service.Service`."""
    from thermeta.daemon.alerts.service import AlertService

    plugin = AlertService(service.config, service.store, service.clock, publish=service.publish)
    service.add_judge(plugin.on_forecast)  # before the forecast is stored and published
    service.alerts = plugin
    return plugin
