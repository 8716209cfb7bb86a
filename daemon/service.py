"""The running service: broker -> writer -> store -> refits -> forecasts out (and plug-ins).

    Service(config, clock=None).start() ... .stop()

Threads: paho's network loop (hands messages to the writer), the writer (batches, commits, acks),
APScheduler's worker (refits, retention, heartbeat), and any plug-in's own (the alert outbox).

Plug-in seam: if a module ``thermeta.daemon.alerts`` exists with ``attach(service)``, it is called
once the store is open; an object it returns gets ``start()`` before ingest starts and ``stop()``
at shutdown.  Plug-ins use ``add_judge``, ``add_forecast_listener``, ``publish``, ``store``,
``config``, ``clock`` and ``stats``.
"""

from __future__ import annotations

import importlib
import logging
import math
import os
import socket
import threading
import time
from collections.abc import Callable
from datetime import UTC
from typing import Any

from thermeta.daemon.clock import Clock, SystemClock
from thermeta.daemon.config import Config
from thermeta.daemon.ingest.mqtt import MqttLink, read_retained
from thermeta.daemon.ingest.topics import Router
from thermeta.daemon.ingest.writer import Activity, Writer
from thermeta.daemon.refit.rounds import Listener, Refitter
from thermeta.daemon.scheduling import StepWatch
from thermeta.daemon.states import ItemState
from thermeta.daemon.timefmt import use_zone
from thermeta.storage.errors import ThermetaError
from thermeta.storage.store import Store, instance_beat_key, safe_url

RATE_TAU_S = 60.0  # the readings rate's averaging time
log = logging.getLogger("thermeta.service")

PLUGINS = ("thermeta.daemon.alerts",)
HEARTBEAT_S = 5.0
# Shutdown: each step waits at most this long (the writer: for its last commit), so SIGTERM ends
# the service within seconds even with the store locked or a refit round under way; nothing
# unacknowledged is lost (the broker sends it again to the next run).
STOP_WRITER_S = 3.0
STOP_STEP_S = 1.0
RETENTION_EVERY_S = 3600.0
SKIP_LOG_EVERY_S = 300.0


class AlreadyRunning(ThermetaError):
    """Another thermeta is running on the same store."""


def status_topic_of(config: Config) -> str:
    """This instance's retained status topic: ``<status_topic>/<client id>`` (one per daemon, so
    stopping one never marks another offline)."""
    return f"{config.publish.status_topic}/{config.broker.client_id}"


def _process_alive(pid: int) -> bool:
    """Whether process ``pid`` on this host is running a thermeta."""
    try:
        with open(f"/proc/{pid}/cmdline", "rb") as f:
            return b"thermeta" in f.read()
    except OSError:
        try:
            os.kill(pid, 0)
        except ProcessLookupError:
            return False
        except PermissionError:
            return True
        return True


def _holder_alive(seen: dict[str, Any], again: Callable[[], dict[str, Any] | None]) -> bool:
    """Whether the process a heartbeat or status ``seen`` names (its ``pid`` and ``host``) is
    another live thermeta: on this host, while that process lives; on another, while its
    ``heartbeat_wall`` still moves (``again()`` reads it anew after one heartbeat)."""
    pid, host = seen.get("pid"), seen.get("host")
    if not isinstance(pid, int) or not host:
        return False
    if host == socket.gethostname():
        return pid != os.getpid() and _process_alive(pid)
    beat = seen.get("heartbeat_wall")
    if not isinstance(beat, (int, float)) or time.time() - beat > 3 * HEARTBEAT_S:
        return False
    time.sleep(HEARTBEAT_S + 1.0)
    return (again() or {}).get("heartbeat_wall") != beat


class Service:
    def __init__(self, config: Config, clock: Clock | None = None, store: Store | None = None):
        self.config = config
        use_zone(config.timezone)  # clock times in alerts, deadlines and logs: the site's zone
        self.clock: Clock = clock or SystemClock()
        self.store = store or Store(config.storage.url)
        self.router = Router(config.items)
        self.activity = Activity()
        self.refitter = Refitter(
            self.store, config, self.clock, self.activity, publish=self._publish_forecast
        )
        self.writer = Writer(self.store, self.router, config, self.clock, self._ack, self.activity)
        self.link: MqttLink | None = None
        self.scheduler: Any = None
        self.step_watch: StepWatch | None = None
        self.plugins: list[Any] = []
        self.started_at: float | None = None
        self.started_mono: float | None = None  # time.monotonic() at start (daemon/metrics.py)
        self.http: Any = None  # the [http] figures' server, when listening
        self.cluster: Any = None  # [cluster]: this daemon's leases (daemon/cluster/)
        self.stopped = threading.Event()
        self._rate = {"t": time.monotonic(), "n": 0, "per_s": 0.0}

    # -- what plug-ins use --------------------------------------------------------------------
    def add_forecast_listener(self, cb: Listener) -> None:
        """``cb(update)`` with a :class:`~thermeta.daemon.refit.rounds.ForecastUpdate` after each
        item's refit."""
        self.refitter.listeners.append(cb)

    def add_judge(self, cb: Listener) -> None:
        """``cb(update)`` after each item's refit, BEFORE its forecast is stored and published:
        it may change the states in ``update.body`` (the alert rules hold them there)."""
        self.refitter.judges.append(cb)

    def publish(self, topic: str, payload: str | bytes, qos: int = 1, retain: bool = False):
        if self.link is None:
            raise RuntimeError("the service is not connected yet")
        return self.link.publish(topic, payload, qos=qos, retain=retain)

    @property
    def stats(self) -> dict[str, Any]:
        w = self.writer.counts
        return {
            "connected": bool(self.link and self.link.connected.is_set()),
            "broker": f"{self.config.broker.host}:{self.config.broker.port}",
            "readings_per_s": round(self._rate["per_s"], 2),
            "readings": w["readings"],
            "dead_letters": w["dead_letters"],
            "backlog": self.writer.backlog(),
            "refits": self.refitter.runs,
            "last_refit_s": round(self.refitter.last_run_s, 3),
        }

    # -- life cycle ---------------------------------------------------------------------------
    def start(self) -> None:
        cfg = self.config
        log.info("store %s", safe_url(cfg.storage.url))
        from thermeta.daemon.config import overrides

        for note in overrides(cfg):
            log.info("%s", note)
        if cfg.cluster.group:
            from thermeta.daemon.cluster import Cluster

            self.cluster = Cluster(self)  # its tables join the schema
            self.cluster.create_tables()
        else:
            self.store.create_all()
        if self.cluster is None:  # a group's daemons share the store by design
            self._check_alone()
        self._check_client_id()
        self._load_items()
        self.refitter.load_previous()
        self.writer.start()
        self._attach_plugins()
        self.link = MqttLink(
            cfg.broker,
            self.router.filters(),
            self.writer.submit,
            self.clock,
            status_topic_of(cfg),
            {"pid": os.getpid(), "host": socket.gethostname()},
            max_payload_bytes=cfg.ingest.max_payload_bytes,
            share_group=cfg.cluster.group,
        )
        self.link.start()
        self._start_scheduler()
        if self.cluster is not None:
            self.cluster.start()
        self.started_at = self.clock.now()
        self.started_mono = time.monotonic()
        if cfg.http.listen:
            from thermeta.daemon.metrics import MetricsServer

            try:
                self.http = MetricsServer(self, cfg.http.listen).start()
            except OSError as exc:  # the figures are for watching; readings go on without them
                log.error("[http] listen %s: cannot serve the figures: %s", cfg.http.listen, exc)
        log.info("forecasts go to %s/<item>", cfg.publish.topic_prefix)

    def _check_alone(self) -> None:
        """Refuse to start beside another thermeta on this store: the two would share the
        broker session and the forecasts.  The last heartbeat names its process (see
        :func:`_holder_alive`)."""
        hb = self.store.get_meta("daemon") or {}
        if hb.get("state") != "running":
            return
        pid, host = hb.get("pid"), hb.get("host")
        if _holder_alive(hb, lambda: self.store.get_meta("daemon")):
            raise AlreadyRunning(
                f"another thermeta is already running on this store (pid {pid} on host {host}); "
                "stop it first, or give this one its own [storage] url and [broker] client_id"
            )

    def _check_client_id(self) -> None:
        """Refuse to start while another thermeta holds our client id on the broker: our
        durable connection would take over its session (and it ours, over and over).  Its
        retained status, read by a separate short-lived client before we connect, names it:
        ``online`` with a process that still lives counts (the broker's last will turns a dead
        one's status ``offline`` after the keepalive; a dead pid on this host never counts)."""
        b = self.config.broker
        topic = status_topic_of(self.config)
        st = read_retained(b, topic)
        if not st or st.get("state") != "online":
            return
        if _holder_alive(st, lambda: read_retained(b, topic)):
            raise AlreadyRunning(
                f"another thermeta is already running with client id {b.client_id} on broker "
                f"{b.host}:{b.port} (pid {st['pid']} on host {st['host']}); stop it first, or "
                "give this one its own [broker] client_id"
            )

    def _load_items(self) -> None:
        last = self.store.last_reading_times()
        for it in self.config.items:
            if not it.is_pattern:
                self.activity.register(it.name, it, last.get(it.name))
        for row in self.store.list_items("load"):
            cfg = self.router.item_for(row["name"], row["topic"])
            if cfg is not None:
                self.activity.register(row["name"], cfg, last.get(row["name"]))

    def _attach_plugins(self) -> None:
        for name in PLUGINS:
            try:
                mod = importlib.import_module(name)
            except ModuleNotFoundError as exc:
                if exc.name != name:
                    raise
                continue
            attach = getattr(mod, "attach", None)
            if attach is None:
                continue
            try:
                plugin = attach(self)
                if plugin is not None:
                    plugin.start()
                    self.plugins.append(plugin)
                    log.info("plug-in %s started", name)
            except Exception:  # noqa: BLE001 - readings must still be kept without the plug-in
                log.exception("plug-in %s failed to start; running without it", name)

    def _start_scheduler(self) -> None:
        from apscheduler.events import EVENT_JOB_ERROR, EVENT_JOB_MAX_INSTANCES, EVENT_JOB_MISSED
        from apscheduler.schedulers.background import BackgroundScheduler

        rate = self.clock.rate
        sched = BackgroundScheduler(timezone=UTC)
        opts = {"max_instances": 1, "coalesce": True, "misfire_grace_time": None}
        refit_s = self.config.fit.refit_every_s / rate
        from datetime import datetime, timedelta

        # The first round comes one interval after start: forecasts from before a restart are
        # still retained and stored, and a restart's backlog drains first.
        first = datetime.now(UTC) + timedelta(seconds=refit_s)
        sched.add_job(
            self.refitter.run_once,
            "interval",
            seconds=refit_s,
            id="refit",
            next_run_time=first,
            **opts,
        )
        sched.add_job(
            self._heartbeat,
            "interval",
            seconds=HEARTBEAT_S,
            id="heartbeat",
            next_run_time=datetime.now(UTC),
            **opts,
        )
        if self.config.storage.retention_days > 0:
            sched.add_job(
                self.prune,
                "interval",
                seconds=RETENTION_EVERY_S / rate,
                id="retention",
                next_run_time=first + timedelta(seconds=5),
                **opts,
            )

        skipped: dict[str, list[float]] = {}  # job id -> [last line's time, runs skipped since]

        def on_event(event) -> None:
            if event.code == EVENT_JOB_ERROR:
                log.error("scheduled job %s failed: %r", event.job_id, event.exception)
                return
            # One line per job every SKIP_LOG_EVERY_S, with a count: a round that outlasts its
            # interval would otherwise say so at every tick.
            last = skipped.setdefault(event.job_id, [float("-inf"), 0])
            last[1] += 1
            now = time.monotonic()
            if now - last[0] >= SKIP_LOG_EVERY_S:
                log.warning(
                    "scheduled job %s skipped %d time(s): the previous run is still going "
                    "(said at most every %g s)",
                    event.job_id,
                    last[1],
                    SKIP_LOG_EVERY_S,
                )
                last[0], last[1] = now, 0

        sched.add_listener(on_event, EVENT_JOB_ERROR | EVENT_JOB_MISSED | EVENT_JOB_MAX_INSTANCES)
        sched.start()
        self.scheduler = sched
        self.step_watch = StepWatch(sched)  # APScheduler times by the wall clock, even in a demo
        self.step_watch.start()

    def refit_now(self) -> dict[str, ItemState]:
        """Run one refit round at once (tests, the demo)."""
        return self.refitter.run_once()

    def prune(self) -> None:
        st, now = self.config.storage, self.clock.now()
        history_s = st.retention_days if st.history_days is None else st.history_days
        gone = self.store.prune(
            now - st.retention_days * 86400.0,
            history_before_ts=now - history_s * 86400.0 if history_s > 0 else -math.inf,
        )
        if any(gone.values()):
            log.info(
                "retention removed %(readings)d readings, %(forecasts)d forecasts, "
                "%(dead_letters)d dead letters",
                gone,
            )

    def _heartbeat(self, state: str = "running") -> None:
        now_m = time.monotonic()
        n = self.writer.counts["readings"]
        dt = now_m - self._rate["t"]
        if dt > 0:
            # a moving average over about a minute: a slow feed (a reading a probe a minute)
            # reads as its rate, not as 0.0 between its readings
            # avg += (1 - e^(-dt/tau)) (now - avg)
            share = 1.0 - math.exp(-dt / RATE_TAU_S)
            inst = (n - self._rate["n"]) / dt
            self._rate.update(per_s=self._rate["per_s"] + share * (inst - self._rate["per_s"]))
            self._rate.update(t=now_m, n=n)
        body = dict(
            self.stats,
            state=state,
            pid=os.getpid(),
            heartbeat_at=self.clock.now(),
            heartbeat_wall=time.time(),
            host=socket.gethostname(),
            started_at=self.started_at,
        )
        if self.cluster is not None:
            body.update(group=self.cluster.group, instance=self.cluster.instance)
        try:
            with self.store.batch():  # one commit for both
                self.store.set_meta("daemon", body)  # the site's newest (the dashboard's)
                if self.cluster is not None:  # each daemon of a group its own: status lists them
                    self.store.set_meta(instance_beat_key(self.cluster.instance), body)
        except Exception:  # noqa: BLE001 - the heartbeat is best effort
            log.exception("could not write the heartbeat")
        if state == "running" and self.link is not None:
            try:
                self.link.beat()
            except Exception:  # noqa: BLE001 - the heartbeat is best effort
                log.exception("could not renew the status")

    def stop(self) -> None:
        """Stop taking messages, write and acknowledge what is queued, publish offline, close;
        every step bounded (see STOP_WRITER_S), the refit round left between two items."""
        if self.stopped.is_set():
            return
        log.info("stopping: flushing queued readings")
        self.refitter.stopping.set()
        if self.http is not None:
            self.http.stop()
        if self.link is not None:
            self.link.stop_receiving()
        self.writer.stop(timeout=STOP_WRITER_S)
        if self.writer.is_alive():
            log.warning(
                "the store did not take the last batch within %g s; leaving it unacknowledged "
                "(the broker sends it again)",
                STOP_WRITER_S,
            )
        if self.step_watch is not None:
            self.step_watch.stop()
        if self.scheduler is not None:
            _bounded(lambda: self.scheduler.shutdown(wait=True), "the refit round")
        if self.cluster is not None:
            _bounded(self.cluster.stop, "the cluster's leases")
        _bounded(self.refitter.batch.close, "the refit's worker processes")
        for plugin in self.plugins:
            _bounded(plugin.stop, f"plug-in {plugin!r}")
        _bounded(lambda: self._heartbeat("stopped"), "the last heartbeat")
        if self.link is not None:
            _bounded(self.link.close, "the broker connection", STOP_STEP_S + 2.0)
        _bounded(self.store.close, "the store")
        self.stopped.set()
        log.info(
            "stopped: %d readings and %d dead letters written this run",
            self.writer.counts["readings"],
            self.writer.counts["dead_letters"],
        )

    def busy(self) -> str | None:
        """What is still running after :meth:`stop` gave up waiting (None: nothing)."""
        if self.writer.is_alive():
            return "the writer"
        if self.refitter.busy():
            return "the refit round"
        return None

    # -- internals ----------------------------------------------------------------------------
    def _ack(self, batch) -> None:
        if self.link is not None:
            self.link.ack(batch)

    def _publish_forecast(self, item: str, payload: str) -> None:
        if self.link is None:
            return
        pub = self.config.publish
        self.link.publish(f"{pub.topic_prefix}/{item}", payload, qos=pub.qos, retain=pub.retain)


def _bounded(step: Any, what: str, seconds: float = STOP_STEP_S) -> None:
    """Run a shutdown step, waiting for it at most ``seconds`` (it goes on in the background;
    the process ends soon anyway)."""

    def run() -> None:
        try:
            step()
        except Exception:  # noqa: BLE001 - shutdown goes on
            log.exception("stopping %s failed", what)

    t = threading.Thread(target=run, name=f"thermeta-stop-{what[:20]}", daemon=True)
    t.start()
    t.join(seconds)
    if t.is_alive():
        log.warning("gave up waiting for %s after %g s", what, seconds)
