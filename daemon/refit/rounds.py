"""Rolling refits: each item with new readings is refitted on its recent window, its levels
judged, its forecast stored, published (retained) and handed to listeners.

One probe, one stored series, one window of readings; each of the item's levels (its limits,
targets and a schedule's stages, ``daemon/levels/``) gets the forecast of its own threshold from
that window, and is judged from it (``judging.py``: the states and their order).  Judges (the
alert rules) run before the forecast is stored and published and write the states they hold
into it, so what is shown and what is alerted are one decision.

Sides: a level's configured ``side``, or (``auto``) the side opposite the live value when the
level is first judged, recorded in the store (``level_sides``) and never changed afterwards: an
old reading backfilled later cannot flip it.

Episodes (``storage/episodes.py``): opened by a start message or ``thermeta start``, or, for an
item with a ``start`` temperature (a schedule sets one), when the probe passes it heading for
its targets; closed by an end message or ``thermeta end``, when every target is reached, or when
the probe goes back past the start by :data:`START_BAND_C` (the next batch).  An episode's
``Tally`` (readings since its start) keeps when each target was reached, the time and
degree-minutes beyond each limit and the mean kinetic temperature; its summary is the episode's
record.

One item's failed fit (an exception, or a result with ``ok=False``) is logged and published as
such; the other items go on.

An item with a ``defrost_topic`` gets its newest defrost in the forecast (``"defrost"``:
``on``, ``started_at``, ``ended_at``; ``daemon/ingest/defrost.py``) for the alert rules'
defrost hold.

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

import numpy as np
from thermeta.daemon.clock import Clock, monotonic_of
from thermeta.daemon.config import AMBIENT_SUFFIX, DEFROST_SUFFIX, Config, ItemConfig
from thermeta.daemon.ingest.defrost import defrost_status
from thermeta.daemon.ingest.writer import Activity
from thermeta.daemon.levels.spec import levels_of
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
from thermeta.daemon.refit.judging import judge_item
from thermeta.daemon.refit.lessons import PriorKeeper
from thermeta.daemon.refit.workers import default_workers
from thermeta.daemon.states import AmbientMode, ItemState, Side
from thermeta.predictors import forecast
from thermeta.predictors.outcome import Reason
from thermeta.predictors.prior import Prior
from thermeta.predictors.result import Forecast
from thermeta.predictors.shared import shared_fits
from thermeta.storage.store import Store

log = logging.getLogger("thermeta.refit")

ERROR_LOG_EVERY_S = 300.0
SAVE_EVERY = 50  # forecasts per store transaction
# The most readings one fit sees: a denser window is thinned evenly (its newest reading kept), so
# a round's cost stays bounded however fast a probe reports (60,000 readings cost a fit ~2 s).
MAX_FIT_POINTS = 1500
# How far back a defrost signal is read beyond the longest hold (max + recovery): a start older
# than that holds nothing any more, and a signal repeated at least this often is read right.
DEFROST_LOOKBACK_S = 3600.0


class Refitter:
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

    def _item_id(self, name: str, cfg: ItemConfig, now: float) -> int:
        item_id = self.item_ids.get(name) or self.store.item_id(name)
        if item_id is None:
            item_id = self.store.ensure_item(name, unit=cfg.unit, topic=cfg.topic, now=now)
        self.item_ids[name] = item_id
        return item_id

    def _refit(
        self,
        name: str,
        cfg: ItemConfig,
        now: float,
        last_ts: float | None,
        silent_s: float | None = None,
    ) -> Refitted:
        """Fit one item's levels and judge them; returns what to store and publish (``silent_s``:
        how long the item has been silent, by arrival; None: judged from ``last_ts``)."""
        item_id = self._item_id(name, cfg, now)
        since = None if last_ts is None else last_ts - cfg.window_s
        window = self.batch.readings(item_id)
        if window is not None:
            t, y = window
            rows: Any = t
        else:
            rows = self.store.recent_readings(item_id, since_ts=since)
            t = np.fromiter((r[0] for r in rows), float, len(rows))
            y = np.fromiter((r[1] for r in rows), float, len(rows))
        t_fit, y_fit = thin(t, y, MAX_FIT_POINTS)
        amb_t = amb_y = None
        if cfg.ambient_topic:
            arows = self.store.recent_readings(name + AMBIENT_SUFFIX, since_ts=since)
            if arows:
                amb_t, amb_y = thin(
                    np.array([r[0] for r in arows]), np.array([r[1] for r in arows]), MAX_FIT_POINTS
                )
        mode: AmbientMode = (
            "measured" if amb_y is not None else ("known" if cfg.ambient is not None else "fitted")
        )
        levels = levels_of(cfg)
        value_c = float(y[np.argmax(t)]) if len(rows) else None
        sides = self.keeper.sides(name, cfg, levels, value_c, now)
        episode = self.keeper.episode(name, cfg, levels, t, y, now)
        cls = (episode.cls if episode is not None and episode.cls else None) or cfg.prior_class
        cls = cls or name
        prior = (
            self.teacher.prior_for(name, cls, since, episode)
            if uses_prior(cfg, mode == "measured")
            else None
        )
        fcs: list[Forecast | None] = []
        made: dict[tuple[float, Side | None], Forecast] = {}
        with shared_fits():  # one window, several levels: its threshold-free fits made once
            for i, lv in enumerate(levels):
                key = (lv.threshold_c, sides.get(lv.name))
                if key not in made:
                    kw = forecast_kwargs(cfg, key[1], amb_t, amb_y)
                    quick = self.batch.forecast(item_id, lv.threshold_c, prior, kw)
                    if quick is not None:
                        self.fits += 1
                        made[key] = quick
                    else:
                        made[key] = self._fit(
                            name, cfg, mode, t_fit, y_fit, rows, lv.threshold_c, prior, kw
                        )
                    if i == 0 and mode != "measured":
                        self.teacher.learn_from(
                            name,
                            cls,
                            made[key],
                            prior,
                            now,
                            episode,
                            self._plain(t_fit, y_fit, lv.threshold_c, kw),
                        )
                fcs.append(made[key])
        tally = (
            None if episode is None else self.keeper.tally(name, levels, sides, episode, item_id, t)
        )
        period = None
        if any(lv.budget_s is not None for lv in levels) and (
            episode is None or episode.closed_at is not None
        ):
            period = self.keeper.period(name, cfg, levels, sides, item_id, now)
        state, body = judge_item(
            name,
            cfg,
            levels,
            fcs,
            sides,
            now,
            last_ts,
            check_every_s=self.config.fit.refit_every_s,
            silent_s=silent_s,
            episode=episode,
            tally=tally,
            period_tally=period,
        )
        if episode is not None and tally is not None:
            self.keeper.keep_record(name, cfg, levels, episode, tally, body)
        if cfg.defrost_topic:
            body["defrost"] = self._defrost(name, cfg, now)
        if prior is not None and prior.n_episodes:
            body["prior_class"] = cls
        return Refitted(name, cfg, item_id, state, body, last_ts)

    def _fit(
        self,
        name: str,
        cfg: ItemConfig,
        mode: AmbientMode,
        t: np.ndarray,
        y: np.ndarray,
        rows: list,
        threshold_c: float,
        prior: Prior | None,
        kw: dict[str, Any],
    ) -> Forecast:
        """One forecast of the item's window for one threshold; a failure is a result."""
        self.fits += 1
        try:
            fc = self._predict(t, y, threshold_c, prior=prior, **kw)
            if not fc.ok and len(rows) >= cfg.min_points:
                self._log_error(name, "no forecast for %s: %s", name, fc.reason)
            return fc
        except Exception as exc:  # noqa: BLE001 - a failed fit is a result, not a crash
            self._log_error(name, "fit of %s raised %s: %s", name, exc.__class__.__name__, exc)
            fc = Forecast(
                threshold=threshold_c,
                model=cfg.model,
                ambient_mode=mode,
                n_points=len(rows),
                ok=False,
                reason=f"fit error: {exc.__class__.__name__}: {exc}"[:300],
                reason_code=Reason.FIT_FAILED,
            )
            if len(rows):
                fc.t_last, fc.value_now = float(t.max()), float(y[np.argmax(t)])
            return fc

    # -- defrost and lessons ---------------------------------------------------------------------
    def _defrost(self, name: str, cfg: ItemConfig, now: float) -> dict[str, Any] | None:
        """The item's newest defrost from its stored signal (None: none lately), for the rules'
        defrost hold."""
        since = now - cfg.defrost_max_s - cfg.defrost_recovery_s - DEFROST_LOOKBACK_S
        rows = self.store.recent_readings(name + DEFROST_SUFFIX, since_ts=since, until_ts=now)
        return defrost_status(rows)

    def _plain(
        self, t: np.ndarray, y: np.ndarray, threshold_c: float, kw: dict[str, Any]
    ) -> Callable[[], Forecast]:
        """The fit of this window without the prior, made only when a lesson needs it."""
        return lambda: self._predict(t, y, threshold_c, **kw)

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

    def _log_error(self, name: str, msg: str, *args: Any) -> None:
        # Rate-limited per item, so a persistently failing item logs every few minutes.
        now = time.monotonic()
        if now - self._error_logged.get(name, -1e9) >= ERROR_LOG_EVERY_S:
            self._error_logged[name] = now
            log.warning(msg, *args, exc_info=log.isEnabledFor(logging.DEBUG))
