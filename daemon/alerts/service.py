"""The alert plug-in of the running service: forecasts in, rules applied, alerts into the outbox,
one worker per hook delivering them.

    svc = AlertService(config, store, clock, publish)   # attach() builds it from a Service
    svc.start(); ...; svc.on_forecast(update); ...; svc.stop()

``on_forecast`` runs on the refit thread BEFORE the forecast is stored and published: the rules
write the states they hold into it, so the state everyone sees and the alerts sent are one
decision (see ``rules.py``).  It only touches the store (one short transaction when something
changed, a savepoint of the refit's transaction for its chunk); every network call happens on the
hooks' own threads.
"""

from __future__ import annotations

import logging
import threading
from collections.abc import Callable
from typing import Any

from thermeta.daemon.alerts.hooks.base import Hook, make_hook
from thermeta.daemon.alerts.message import build_alert
from thermeta.daemon.alerts.outbox import OutboxWorker
from thermeta.daemon.alerts.rules import ItemAlertState, RuleParams, step
from thermeta.daemon.clock import Clock, SystemClock
from thermeta.daemon.refit.rounds import ForecastUpdate
from thermeta.storage.alerts import AlertStore

log = logging.getLogger("thermeta.alerts")

PNG_HISTORY_S = 4 * 3600.0


class AlertService:
    def __init__(
        self,
        config: Any,
        store: Any,
        clock: Clock | None = None,
        publish: Callable[..., Any] | None = None,
        *,
        base_s: float = 5.0,
        max_s: float = 300.0,
        poll_s: float = 2.0,
        attach_png: bool = True,
    ):
        self.config = config
        self.store = store
        self.clock = clock or SystemClock()
        self.astore = AlertStore(store)
        self.items: dict[str, Any] = {it.name: it for it in config.items if not it.is_pattern}
        png = self.png_for if attach_png else None
        self.hooks: list[Hook] = [
            make_hook(i, h, publish=publish, png_for=png) for i, h in enumerate(config.hooks)
        ]
        self.worker_opts = {"base_s": base_s, "max_s": max_s, "poll_s": poll_s}
        self.workers: list[OutboxWorker] = []
        self.states: dict[str, ItemAlertState] = {}
        self.raised: list[dict[str, Any]] = []  # this run's alerts, newest last
        self._lock = threading.Lock()

    # -- life cycle ---------------------------------------------------------------------------
    def start(self) -> None:
        self.states = {k: ItemAlertState.from_json(v) for k, v in self.astore.load_states().items()}
        for hook in self.hooks:
            shared = bool(getattr(getattr(self.config, "cluster", None), "group", None))
            w = OutboxWorker(hook, self.astore, shared=shared, **self.worker_opts)
            w.start()
            self.workers.append(w)
        if not self.hooks:
            log.info("no [[hook]] tables: alerts are logged and stored only")

    def stop(self) -> None:
        for w in self.workers:
            w.halt.set()
            w.wake.set()
        for w in self.workers:
            w.join(10.0)
        for hook in self.hooks:
            hook.close()
        self.workers = []

    def reload_states(self, names: list[str]) -> None:
        """Read these items' rule memory from the store again ([cluster]: taken over from
        another daemon, whose alerts must not be raised twice)."""
        wanted = set(names)
        stored = {k: v for k, v in self.astore.load_states().items() if k in wanted}
        with self._lock:
            for name in wanted:
                self.states[name] = ItemAlertState.from_json(stored.get(name))

    # -- the listener -------------------------------------------------------------------------
    def on_forecast(self, update: ForecastUpdate) -> None:
        """Apply the rules to one item's new forecast (the refitter's listener)."""
        cfg, body, name = update.item, update.body, update.name
        self.items.setdefault(name, cfg)
        now = self.clock.now()
        params = RuleParams.of(cfg, self.config.fit.refit_every_s)
        with self._lock:
            old = self.states.get(name) or ItemAlertState()
            st = ItemAlertState.from_json(old.to_json())
            acked = st.incident_open and self.astore.ack_of(name, st.incident) is not None
            before = {k: body.get(k) for k in ("state", "focus", "levels")}
            shown = [dict(d) for d in body.get("levels") or []]
            try:
                events = step(st, body, params, now, acked)
                alerts = [
                    build_alert(
                        name,
                        body,
                        ev,
                        st,
                        params,
                        now,
                        unit=cfg.unit,
                        silence_s=cfg.silence_s,
                        site=cfg.site,
                        what_to_do=cfg.what_to_do,
                    )
                    for ev in events
                ]
                if alerts or st.to_json() != old.to_json():
                    # On a store failure the old state stays and the next refit decides again
                    # (in the refit's batch, also when the batch is rolled back after all).
                    self.astore.commit_step(name, st.to_json(), alerts, self.hooks_for, now)
                    self.store.on_rollback(lambda: self.reload_states([name]))
            except Exception:
                # the forecast goes out with its states as judged, not as held
                body.update(before)
                body["levels"] = shown
                raise
            self.states[name] = st
            self.raised.extend(alerts)
            del self.raised[:-1000]
        for a in alerts:
            log.warning("alert %s: %s", a["event"], a["sentence"])
        if alerts:  # once the outbox rows are committed (the refit's batch may hold them)
            self.store.after_commit(self._wake)

    def _wake(self) -> None:
        for w in self.workers:
            w.wake.set()

    def hooks_for(self, alert: dict[str, Any]) -> list[str]:
        return [h.key for h in self.hooks if h.wants(alert)]

    # -- the email attachment -----------------------------------------------------------------
    def png_for(self, alert: dict[str, Any]) -> bytes | None:
        cfg = self.items.get(alert["item"])
        if cfg is None:
            return None
        from thermeta.daemon.views import plotting

        title = f"{alert['item']}: {alert['level']}"
        return plotting.item_png(self.store, cfg, history_s=PNG_HISTORY_S, title=title)
