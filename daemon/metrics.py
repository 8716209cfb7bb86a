"""The service's own figures, for the monitoring that watches the watcher: ``[http] listen =
"127.0.0.1:9108"`` serves

- ``/metrics``: OpenMetrics (``prometheus_client``; the Prometheus text format to a client
  that does not ask for OpenMetrics), read from the running service at each scrape: readings
  stored, dead letters, the ingest backlog, whether the broker is connected, refit rounds and
  their durations, forecasts made by the batch and one by one, the alert outbox by status, and
  per item the time to its crossing and its state;
- ``/healthz``: 200 and ``{"ok": true}`` while the service is well, 503 and the problems when
  the broker is gone, the newest refit round took longer than ``refit_every``, or no round has
  finished for two ``refit_every`` (plus the last round's own time) since the first was due.

The server is the standard library's WSGI server in its own threads; nothing here touches the
store except the outbox count, a read.
"""

from __future__ import annotations

import json
import logging
import math
import threading
import time
from collections.abc import Callable, Iterable, Iterator
from socketserver import ThreadingMixIn
from typing import Any
from wsgiref.simple_server import WSGIRequestHandler, WSGIServer, make_server

from prometheus_client import CollectorRegistry, make_wsgi_app
from prometheus_client.core import (
    CounterMetricFamily,
    GaugeMetricFamily,
    Metric,
    StateSetMetricFamily,
    SummaryMetricFamily,
)
from prometheus_client.registry import Collector
from thermeta.daemon.states import ItemState

log = logging.getLogger("thermeta.http")

OVERDUE_ROUNDS = 2.0  # no round finished for this many refit_every: unhealthy


class ServiceCollector(Collector):
    """The service's figures at the moment of a scrape."""

    def __init__(self, service: Any):
        self.service = service

    def collect(self) -> Iterator[Metric]:
        s = self.service
        w, rf = s.writer.counts, s.refitter
        yield CounterMetricFamily("thermeta_readings", "Readings stored", value=w["readings"])
        yield CounterMetricFamily(
            "thermeta_dead_letters", "Messages set aside as dead letters", value=w["dead_letters"]
        )
        yield GaugeMetricFamily(
            "thermeta_ingest_backlog", "Messages received, not yet stored", value=s.writer.backlog()
        )
        yield GaugeMetricFamily(
            "thermeta_broker_connected", "1 while connected to the broker", value=connected(s)
        )
        yield CounterMetricFamily("thermeta_refit_rounds", "Refit rounds run", value=rf.runs)
        yield SummaryMetricFamily(
            "thermeta_refit_round_seconds",
            "Refit rounds' durations",
            count_value=rf.runs,
            sum_value=rf.total_run_s,
        )
        yield GaugeMetricFamily(
            "thermeta_refit_last_round_seconds", "The newest refit round's duration", rf.last_run_s
        )
        ways = CounterMetricFamily(
            "thermeta_refit_forecasts",
            "Forecasts made: by the batched lumped fit, or one item at a time",
            labels=["way"],
        )
        for way in ("batch", "item"):
            ways.add_metric([way], rf.batch.counts[way])
        yield ways
        depth = self._outbox()
        if depth is not None:
            box = GaugeMetricFamily(
                "thermeta_outbox", "Alert deliveries in the outbox, by status", labels=["status"]
            )
            for status, n in sorted(depth.items()):
                box.add_metric([status], n)
            yield box
        yield from self._items(dict(rf.previous))

    def _outbox(self) -> dict[str, int] | None:
        try:
            from thermeta.storage.alerts import AlertStore

            return AlertStore(self.service.store).outbox_counts()
        except Exception:  # noqa: BLE001 - no alerts table, or the store busy: left out
            return None

    @staticmethod
    def _items(bodies: dict[str, dict[str, Any]]) -> Iterable[Metric]:
        eta = GaugeMetricFamily(
            "thermeta_item_eta_seconds",
            "Seconds from the item's newest reading to its forecast crossing (absent: none)",
            labels=["item"],
        )
        state = StateSetMetricFamily("thermeta_item_state", "The item's state", labels=["item"])
        for name, body in sorted(bodies.items()):
            value = body.get("eta_s")
            if isinstance(value, int | float) and math.isfinite(value):
                eta.add_metric([name], float(value))
            now = body.get("state")
            state.add_metric([name], {str(st): str(st) == now for st in ItemState})
        yield eta
        yield state


def connected(service: Any) -> bool:
    link = service.link
    return bool(link is not None and link.connected.is_set())


def health(service: Any, now: float | None = None) -> list[str]:
    """What is wrong with the service now (empty: nothing)."""
    now = time.monotonic() if now is None else now
    problems = []
    if not connected(service):
        problems.append("broker: not connected")
    rf = service.refitter
    every = service.config.fit.refit_every_s / service.clock.rate
    if rf.runs and rf.last_run_s > every:
        problems.append(
            f"refit: the newest round took {rf.last_run_s:.1f} s, longer than refit_every "
            f"({every:g} s)"
        )
    since = rf.finished_at if rf.finished_at is not None else service.started_mono
    if since is not None and now - since > OVERDUE_ROUNDS * every + every + rf.last_run_s:
        problems.append(f"refit: no round finished for {now - since:.0f} s")
    return problems


class _Threading(ThreadingMixIn, WSGIServer):
    daemon_threads = True


class _Quiet(WSGIRequestHandler):
    def log_message(self, format: str, *args: Any) -> None:  # noqa: A002 - the base's name
        log.debug("http: " + format, *args)


class MetricsServer:
    """``/metrics`` and ``/healthz`` of one service on ``host:port``."""

    def __init__(self, service: Any, listen: str):
        host, _, port = listen.rpartition(":")
        self.service = service
        registry = CollectorRegistry(auto_describe=False)
        registry.register(ServiceCollector(service))
        self._metrics = make_wsgi_app(registry)
        self._server = make_server(
            host.strip("[]"), int(port), self.app, server_class=_Threading, handler_class=_Quiet
        )
        self.port = self._server.server_port
        self._thread = threading.Thread(
            target=self._server.serve_forever, name="thermeta-http", daemon=True
        )

    def start(self) -> MetricsServer:
        self._thread.start()
        log.info("figures on http://%s:%d/metrics and /healthz", *self._server.server_address[:2])
        return self

    def stop(self) -> None:
        self._server.shutdown()
        self._server.server_close()

    def app(self, environ: dict[str, Any], start_response: Callable) -> Iterable[bytes]:
        path = environ.get("PATH_INFO", "/")
        if path == "/metrics":
            return self._metrics(environ, start_response)
        if path == "/healthz":
            problems = health(self.service)
            body = json.dumps({"ok": not problems, "problems": problems}).encode()
            status = "200 OK" if not problems else "503 Service Unavailable"
            start_response(status, [("Content-Type", "application/json")])
            return [body]
        start_response("404 Not Found", [("Content-Type", "text/plain")])
        return [b"not found: try /metrics or /healthz\n"]
