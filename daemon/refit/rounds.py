"""Rolling refits: each item with new readings is refitted on its recent window, its levels
judged, its forecast stored, published (retained) and handed to listeners.

One probe, one stored series, one window of readings; each of the item's levels (its limits,
targets and a schedule's stages, ``daemon/levels/``) gets the forecast of its own threshold from
that window, and is judged from it (``judging.py``: the states and their order).  Judges (the
alert rules) run before the forecast is stored and published and write the states they hold
into it, so what is shown and what is alerted are one decision.

One item's refit (its window, sides, episode, fits and judging): ``item.py``.

Priors (``predictors/prior.py``, stored in ``storage/priors.py``): each item teaches its prior
class (the open episode's class, else the item key ``prior_class``, default its own name) and
its lumped fits (fitted or given ambient) use the class's prior.  A stretch of readings counts
once, at the first refit whose fit WITHOUT the prior pins k (and a fitted ambient) down
(``prior.learnable``); the item's next lesson can only come from a fit whose readings all start
after that one's newest reading, and within an open episode only once.  A prior is never used on
the episode it learned from: after a lesson, the item's fits keep the prior as it was before it
until their window no longer holds the taught readings and the episode (if one is open) has
ended.  (``lessons.py`` keeps the priors and the lessons.)

Storing: a chunk of :data:`SAVE_EVERY` forecasts is judged and stored in ONE transaction
(``Store.batch``), with the levels' sides and the prior lessons decided since the last chunk and
the alert rules' states: one fsync for the chunk, where the first round after a start used to
pay one for each item's first side, lesson and alert state.  Nothing is published before its
chunk is committed; a crash mid-round loses at most the chunk's decisions, which the next round
makes again.  A round reads each chunk's item ids, recorded sides, newest episodes and priors in
a few queries rather than one each an item.
"""

from __future__ import annotations

import json
import logging
import threading
import time
from collections.abc import Callable
from typing import Any

from thermeta.daemon.clock import Clock, monotonic_of
from thermeta.daemon.config import Config, ItemConfig
from thermeta.daemon.ingest.writer import Activity
from thermeta.daemon.refit.batched import Batch
from thermeta.daemon.refit.common import (
    ForecastUpdate,
    Listener,
    Publish,
    Refitted,
    forecast_kwargs,
    thin,
    uses_prior,
)
from thermeta.daemon.refit.episodes import EpisodeKeeper
from thermeta.daemon.refit.item import (
    DEFROST_LOOKBACK_S,
    ERROR_LOG_EVERY_S,
    MAX_FIT_POINTS,
    ItemRefits,
)
from thermeta.daemon.refit.lessons import PriorKeeper
from thermeta.daemon.refit.workers import default_workers
from thermeta.daemon.states import ItemState
from thermeta.predictors import forecast
from thermeta.predictors.result import Forecast
from thermeta.storage.store import Store

__all__ = [  # what others import from here
    "DEFROST_LOOKBACK_S",
    "ERROR_LOG_EVERY_S",
    "MAX_FIT_POINTS",
    "SAVE_EVERY",
    "ForecastUpdate",
    "Listener",
    "Publish",
    "Refitter",
    "forecast_kwargs",
    "thin",
    "uses_prior",
]

log = logging.getLogger("thermeta.refit")

SAVE_EVERY = 50  # forecasts per store transaction


class Refitter(ItemRefits):
    """The rounds of one service: which items are due, in chunks; stored, published."""

    def __init__(
        self,
        store: Store,
        config: Config,
        clock: Clock,
        activity: Activity,
        publish: Publish | None = None,
    ):
        self.store = store
        self.config = config
        self.clock = clock
        self.activity = activity
        self.publish = publish
        self.judges: list[Listener] = []  # before storing and publishing; may hold the states
        self.listeners: list[Listener] = []  # after publishing
        self.previous: dict[str, dict[str, Any]] = {}
        self.item_ids: dict[str, int] = {}
        self._lock = threading.Lock()
        self.stopping = threading.Event()  # set at shutdown: the round ends after its item
        self._error_logged: dict[str, float] = {}
        self.runs = 0
        self.last_run_s = 0.0
        self.total_run_s = 0.0  # all rounds' time, for the service's figures (daemon/metrics.py)
        self.finished_at: float | None = None  # time.monotonic() at the newest round's end
        self._predict: Callable[..., Forecast] = forecast  # a seam for tests
        self.teacher = PriorKeeper(store)  # the priors and the lessons (lessons.py)
        self.keeper = EpisodeKeeper(store)  # episodes, their tallies, the levels' sides
        self.fits = 0  # forecasts made (one per distinct threshold and side of an item)
        workers = config.fit.workers
        self.batch = Batch(  # the round's batched lumped fits (refit/batched.py, workers.py)
            store,
            default_workers() if workers is None else workers,
            max(config.fit.refit_every_s, 30.0),
        )
        if self.batch.pool is not None:
            self.batch.pool.most = MAX_FIT_POINTS
        self.use_batch = True
        self.owns: Callable[[str], bool] | None = None  # [cluster]: whether our lease still holds

    @property
    def lessons(self) -> int:
        """Lessons taught since the start."""
        return self.teacher.lessons

    def load_previous(self) -> None:
        """Pick up each item's last forecast from the store (after a restart)."""
        for f in self.store.latest_forecasts():
            self.previous[f.item] = f.forecast

    def busy(self) -> bool:
        """Whether a round is running now."""
        return self._lock.locked()

    def run_once(self, force: bool = False) -> dict[str, ItemState]:
        """One round; returns {item: state} for the items published.  Never raises."""
        with self._lock:  # the scheduler never overlaps runs; this guards manual calls too
            t0 = time.monotonic()
            now = self.clock.now()
            dirty = self.activity.take_dirty()
            items, last = self.activity.snapshot()
            silent = self.activity.silences(now, monotonic_of(self.clock))
            self.keeper.load()
            done: dict[str, ItemState] = {}
            pending: list[Refitted] = []
            due_items = []
            for name, cfg in items.items():
                if self.stopping.is_set():
                    break
                prev = self.previous.get(name)
                due = force or name in dirty or prev is None
                going_stale = (
                    prev is not None
                    and prev.get("state") != ItemState.STALE
                    and name in silent
                    and silent[name] > cfg.silence_s
                )
                if due or going_stale:
                    due_items.append((name, cfg))
            self._read_ids([name for name, _ in due_items])
            size = self.batch.chunk
            chunks = [due_items[at : at + size] for at in range(0, len(due_items), size)]
            for c, chunk in enumerate(chunks):
                if self.stopping.is_set():
                    break
                self._preload(chunk)
                self._load_batch(chunk, now, last, chunks[c + 1 :])
                for name, cfg in chunk:
                    if self.stopping.is_set():
                        break
                    try:
                        pending.append(
                            self._refit(name, cfg, now, last.get(name), silent.get(name))
                        )
                    except Exception as exc:  # noqa: BLE001 - one item never stops the others
                        self._log_error(name, "refit of %s failed: %s", name, exc)
                    if len(pending) >= SAVE_EVERY:
                        self._flush(pending, now, done)
                self.batch.clear()
            self.batch.drop_queued()
            self._flush(pending, now, done)
            if done:
                try:
                    self.store.set_meta("last_refit_at", now)
                except Exception:  # noqa: BLE001
                    log.exception("could not record the refit time")
            self.runs += 1
            self.finished_at = time.monotonic()
            self.last_run_s = self.finished_at - t0
            self.total_run_s += self.last_run_s
            return done

    def _flush(self, pending: list[Refitted], now: float, done: dict[str, ItemState]) -> None:
        """Judge, then store a chunk of forecasts, with the sides and lessons decided since the
        last chunk and the judges' own writes, in one transaction; then publish them (one commit
        per item would cost an fsync each and hold the writer's lock as often)."""
        if self.owns is not None:  # a lease lost during the round: its new holder refits it
            pending[:] = [r for r in pending if self.owns(r.name)]
        if not (pending or self.keeper.unrecorded or self.teacher.unstored):
            return
        judged = False
        try:
            with self.store.batch():
                self.keeper.write_sides()
                self.teacher.write()
                self._judge(pending)
                judged = True
                if pending:
                    self.store.save_forecasts(
                        [(r.item_id, now, r.state, r.body, r.last_ts) for r in pending]
                    )
        except Exception:  # noqa: BLE001 - published anyway; the next refit stores again
            log.exception("storing %d forecasts failed", len(pending))
        if not judged:  # the transaction never began: the judges go on as they can
            self._judge(pending)
        for r in pending:
            self._deliver(r)
            done[r.name] = r.state
        pending.clear()

    def _judge(self, pending: list[Refitted]) -> None:
        """Hand each forecast to the judges (the alert rules), which may hold its states."""
        for r in pending:
            update = ForecastUpdate(r.cfg, r.state, r.body, self.previous.get(r.name))
            for judge in list(self.judges):
                try:
                    judge(update)
                except Exception:  # noqa: BLE001 - published as judged; the next refit retries
                    log.exception("judging %s failed", r.name)
            r.state = ItemState(r.body.get("state") or r.state)

    def _read_ids(self, names: list[str]) -> None:
        """The items' ids not known yet, in one query per 500 (new ones are made one by one)."""
        want = [n for n in names if n not in self.item_ids]
        if want:
            try:
                self.item_ids.update(self.store.item_ids(want))
            except Exception:  # noqa: BLE001 - read one by one at their first use
                log.exception("reading the ids of %d items failed", len(want))

    def _preload(self, chunk: list[tuple[str, ItemConfig]]) -> None:
        """What the chunk's refits read of the store that is not known yet (the first round
        after a start), in a few queries: the recorded sides, the newest episodes, the priors."""
        names = [name for name, _ in chunk]
        self.keeper.preload(names)
        classes = []
        for name, cfg in chunk:
            if uses_prior(cfg, bool(cfg.ambient_topic)):
                ep = self.keeper.open_eps.get(name) or self.keeper.last_eps.get(name)
                classes.append(
                    (ep.cls if ep is not None and ep.cls else None) or cfg.prior_class or name
                )
        self.teacher.preload(classes)

    def _load_batch(self, chunk: list, now: float, last: dict[str, float], ahead: list) -> None:
        """Read the chunk's windows in one query and fit its lumped items together (the next
        chunks handed to the worker processes meanwhile); a failure leaves them to the per-item
        way."""
        if not self.use_batch or self._predict is not forecast:  # (a test's own predictor)
            return

        def wanted(part: list[tuple[str, ItemConfig]]) -> list:
            return [
                (self._item_id(n, c, now), c, (last[n] - c.window_s) if n in last else None)
                for n, c in part
            ]

        try:
            self.batch.load(wanted(chunk), [wanted(c) for c in ahead[: self.batch.workers]])
        except Exception:  # noqa: BLE001 - the per-item way still works
            log.exception("the batched fit of %d items failed; fitting them one by one", len(chunk))
            self.batch.clear()

    def _deliver(self, r: Refitted) -> None:
        """Publish a stored forecast and hand it to the listeners."""
        name = r.name
        if self.publish is not None:
            try:
                self.publish(name, json.dumps(r.body))
            except Exception:  # noqa: BLE001 - the store has it; the next refit republishes
                self._log_error(name, "publishing the forecast of %s failed", name)
        update = ForecastUpdate(r.cfg, r.state, r.body, self.previous.get(name))
        self.previous[name] = r.body
        for listener in list(self.listeners):
            try:
                listener(update)
            except Exception:  # noqa: BLE001 - a listener's failure is its own
                log.exception("forecast listener %r failed on %s", listener, name)
