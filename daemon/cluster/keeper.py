"""One daemon's part in a group: its leases, what it tells the others, and its refits' log.

    cluster = Cluster(service)     # before the store's tables are made (they join its schema)
    cluster.start()                # after the scheduler: a lease tick every refit_every / 8
    cluster.stop()                 # a clean stop hands every item over at once

Timing, with ``r = refit_every``: a lease lasts ``LEASE_ROUNDS * r`` from its renewal on the
database's clock and is renewed every ``r / TICKS_PER_ROUND`` (four ticks a lease).  The holder
stops refitting an item once less than ``MARGIN_LEASE`` of its own count of the lease is left (a
tick lost to a slow database does not cost the item yet; a daemon cut off stops before anyone
takes over).
A daemon killed right after a renewal loses its items ``LEASE_ROUNDS * r`` later; the others
take them at their next tick and refit them at once: items are forecast again within
``(LEASE_ROUNDS + 1 / TICKS_PER_ROUND) * r`` plus a round's time.

A new holder waits until ``r`` after the previous holder's newest forecast (``made_at``) before
its first refit of the item, so an item is never refitted twice within one ``refit_every`` by two
daemons; it reads the item's newest forecast and alert memory first, so a warning already sent
is not sent again.  Every refit is logged (``cluster_refits``) with the lease's term.
"""

from __future__ import annotations

import logging
import math
import os
import socket
import threading
import time
from typing import Any

from thermeta.daemon.clock import monotonic_of
from thermeta.daemon.cluster.view import HeldActivity
from thermeta.daemon.refit.common import ForecastUpdate
from thermeta.storage.leases import LeaseStore

log = logging.getLogger("thermeta.cluster")

# Half a round: the take-over time is the lease plus a tick plus the survivors' round, and the
# round (with the dead daemon's items added) is what takes long on a busy machine.
LEASE_ROUNDS = 0.5
TICKS_PER_ROUND = 8
MARGIN_LEASE = 0.5  # a round starts on an item only with this share of the lease left ...
OWN_MARGIN_LEASE = 0.1  # ... and stores its forecast only with this share left
LOG_KEEP_S = 3600.0  # the round log's own retention
ERROR_EVERY_S = 60.0


def instance_of(config: Any) -> str:
    """This daemon's name in its group: [cluster] instance, else its [broker] client_id (stable
    across restarts, which the broker's session of our share of the readings needs)."""
    return str(config.cluster.instance or config.broker.client_id)


class Cluster:
    def __init__(self, service: Any):
        self.service = service
        cfg = service.config
        self.group = str(cfg.cluster.group)
        self.instance = instance_of(cfg)
        self.refit_s = float(cfg.fit.refit_every_s) / service.clock.rate
        self.lease_s = LEASE_ROUNDS * self.refit_s
        self.tick_s = self.refit_s / TICKS_PER_ROUND
        self.leases = LeaseStore(service.store, self.group, self.instance, self.lease_s)
        self.held: dict[str, int] = {}  # item -> lease term
        self.valid_until = -math.inf  # time.monotonic() when our count of the leases runs out
        self.not_before: dict[str, float] = {}  # item -> clock time of its first refit here
        self.ticks = 0
        self.members = 1
        self.last_refit_at: float | None = None
        self._log: list[
            tuple[str, int, float, float]
        ] = []  # refits not yet written to the round log
        self._lock = threading.Lock()
        self._error_at = -math.inf
        self._first = True
        self._runs_seen = 0
        self.view = HeldActivity(service.activity, self)
        service.refitter.activity = self.view
        service.refitter.owns = self.owns
        service.add_forecast_listener(self._on_refit)

    # -- what the refitter asks ------------------------------------------------------------------
    def may_refit(self, name: str, now: float) -> bool:
        """Whether this daemon refits ``name`` in a round starting now (clock time ``now``)."""
        with self._lock:
            if name not in self.held:
                return False
            if time.monotonic() > self.valid_until - MARGIN_LEASE * self.lease_s:
                return False
            return self.not_before.get(name, -math.inf) <= now

    def owns(self, name: str) -> bool:
        """Whether our lease on ``name`` still holds, just before its forecast is judged, stored
        and published (a round that outlasted the lease drops the item)."""
        with self._lock:
            left = self.valid_until - time.monotonic()
            return name in self.held and left > OWN_MARGIN_LEASE * self.lease_s

    def held_names(self) -> list[str]:
        with self._lock:
            return list(self.held)

    # -- life cycle ----------------------------------------------------------------------------
    def create_tables(self) -> None:
        self.leases.create_tables()

    def start(self) -> None:
        from datetime import UTC, datetime

        self.service.scheduler.add_job(
            self.tick,
            "interval",
            seconds=self.tick_s,
            id="cluster",
            next_run_time=datetime.now(UTC),
            max_instances=1,
            coalesce=True,
            misfire_grace_time=None,
        )
        log.info(
            "cluster %s: instance %s, leases of %g s renewed every %g s",
            self.group,
            self.instance,
            self.lease_s,
            self.tick_s,
        )

    def stop(self) -> None:
        """Hand every item over now (the others take them at their next tick)."""
        self._flush_log()
        try:
            self.leases.leave()
        except Exception:  # noqa: BLE001 - the leases run out by themselves
            log.exception("could not give up the leases; they run out in %g s", self.lease_s)
        with self._lock:
            self.held = {}
            self.valid_until = -math.inf

    # -- the tick --------------------------------------------------------------------------------
    def tick(self) -> None:
        """Renew, claim, let go; take up what was gained; log the refits; say how we stand."""
        t0 = time.monotonic()
        try:
            got = self.leases.tick(
                None if self._first else self.held_names(),
                claim=not self._first,  # the first tick only says we are here
                body=self._status(),
            )
        except Exception as exc:  # noqa: BLE001 - the leases run out; readings go on
            if t0 - self._error_at >= ERROR_EVERY_S:
                self._error_at = t0
                log.error("cluster %s: cannot renew the leases: %s", self.group, exc)
            return
        self._first = False
        self.ticks += 1
        self.members = got.members
        ready = self._take_up(got.gained) if got.gained else {}
        with self._lock:
            self.held = dict(got.held)
            self.valid_until = t0 + self.lease_s
            self.not_before.update(ready)
            for name in got.lost:
                self.not_before.pop(name, None)
        took = time.monotonic() - t0
        if took > self.tick_s:
            log.warning(
                "cluster %s: a lease tick took %.1f s (ticks every %g s, leases of %g s)",
                self.group,
                took,
                self.tick_s,
                self.lease_s,
            )
        if got.gained or got.lost:
            log.info(
                "cluster %s: %s holds %d of %d items (%d daemons, %d ours before): "
                "%d taken up, %d let go",
                self.group,
                self.instance,
                len(got.held),
                got.items,
                got.members,
                got.mine,
                len(got.gained),
                len(got.lost),
            )
        if got.gained:
            self._round_soon()
        self._flush_log()
        self._say_slow_round()
        link = self.service.link
        if link is not None:
            link.status_extra.update(self._status())

    def _say_slow_round(self) -> None:
        """A round longer than refit_every delays the take-over of a dead daemon's items too."""
        r = self.service.refitter
        if r.runs != self._runs_seen:
            self._runs_seen = r.runs
            if r.last_run_s > self.refit_s:
                log.warning(
                    "cluster %s: a refit round took %.1f s, longer than refit_every (%g s) "
                    "with %d items held: add daemons or lengthen refit_every",
                    self.group,
                    r.last_run_s,
                    self.refit_s,
                    len(self.held),
                )

    def _take_up(self, names: list[str]) -> dict[str, float]:
        """Items gained: their config, newest reading, forecast and alert memory, read from the
        store; returns when each may first be refitted here (clock time)."""
        svc = self.service
        found = self.leases.taken_over(names)
        bodies = self.leases.current_bodies(names)
        mono = monotonic_of(svc.clock)
        ready: dict[str, float] = {}
        for name, (topic, last_ts, made_at) in found.items():
            cfg = svc.router.item_for(name, topic)
            if cfg is None:
                continue  # not an item of this daemon's config; its lease just stays unused
            svc.activity.register(name, cfg, last_ts)
            svc.activity.note(name, cfg, last_ts, arrived=mono if last_ts is not None else None)
            if name in bodies:
                svc.refitter.previous[name] = bodies[name]
            ready[name] = made_at + self.refit_s * svc.clock.rate
        alerts = getattr(svc, "alerts", None)
        if alerts is not None:
            alerts.reload_states(list(ready))
        return ready

    def _round_soon(self) -> None:
        """Refit what was gained now rather than at the next round (unless one is running)."""
        from datetime import UTC, datetime

        sched = self.service.scheduler
        if sched is None or self.service.refitter.busy():
            return
        try:
            sched.modify_job("refit", next_run_time=datetime.now(UTC))
        except Exception:  # noqa: BLE001 - the next round comes anyway
            log.debug("could not bring the round forward", exc_info=True)

    # -- the round log and the status --------------------------------------------------------------
    def _on_refit(self, update: ForecastUpdate) -> None:
        # the round's clock time: what the store keeps as the forecast's made_at
        now = self.view.round_now or self.service.clock.now()
        with self._lock:
            self._log.append((update.name, self.held.get(update.name, -1), now, time.time()))
            self.last_refit_at = now

    def _flush_log(self) -> None:
        with self._lock:
            rows, self._log = self._log, []
        try:
            self.leases.record_refits(rows, LOG_KEEP_S)
        except Exception:  # noqa: BLE001 - the log is for checking, not for running
            log.debug("could not write the round log", exc_info=True)

    def _status(self) -> dict[str, Any]:
        return {
            "group": self.group,
            "instance": self.instance,
            "items_held": len(self.held),
            "members": self.members,
            "last_refit_at": self.last_refit_at,
            "rounds": self.service.refitter.runs,
            "last_round_s": round(self.service.refitter.last_run_s, 3),
            "pid": os.getpid(),
            "host": socket.gethostname(),
        }
