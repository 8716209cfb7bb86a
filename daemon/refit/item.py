"""One item's refit in a round: its window (from the round's batch, or read), its levels'
sides, its episode, a forecast per distinct threshold and side (the batch's, else
``forecast()``'s), the lesson it may teach, and its judging (``judging.py``).

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
"""

from __future__ import annotations

import logging
import threading
import time
from collections.abc import Callable
from typing import Any

import numpy as np
from thermeta.daemon.config import AMBIENT_SUFFIX, DEFROST_SUFFIX, Config, ItemConfig
from thermeta.daemon.ingest.defrost import defrost_status
from thermeta.daemon.levels.spec import levels_of
from thermeta.daemon.refit.batched import Batch
from thermeta.daemon.refit.common import Refitted, forecast_kwargs, thin, uses_prior
from thermeta.daemon.refit.episodes import EpisodeKeeper
from thermeta.daemon.refit.judging import judge_item
from thermeta.daemon.refit.lessons import PriorKeeper
from thermeta.daemon.states import AmbientMode, Side
from thermeta.predictors.outcome import Reason
from thermeta.predictors.prior import Prior
from thermeta.predictors.result import Forecast
from thermeta.predictors.shared import shared_fits
from thermeta.storage.store import Store

log = logging.getLogger("thermeta.refit")

ERROR_LOG_EVERY_S = 300.0
# The most readings one fit sees: a denser window is thinned evenly (its newest reading kept), so
# a round's cost stays bounded however fast a probe reports (60,000 readings cost a fit ~2 s).
MAX_FIT_POINTS = 1500
# How far back a defrost signal is read beyond the longest hold (max + recovery): a start older
# than that holds nothing any more, and a signal repeated at least this often is read right.
DEFROST_LOOKBACK_S = 3600.0


class ItemRefits:
    """One item's refit; the round (``rounds.Refitter``) holds what it uses."""

    store: Store
    config: Config
    batch: Batch
    keeper: EpisodeKeeper
    teacher: PriorKeeper
    item_ids: dict[str, int]
    fits: int
    _predict: Callable[..., Forecast]
    _error_logged: dict[str, float]
    _lock: threading.Lock

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

    def _log_error(self, name: str, msg: str, *args: Any) -> None:
        # Rate-limited per item, so a persistently failing item logs every few minutes.
        now = time.monotonic()
        if now - self._error_logged.get(name, -1e9) >= ERROR_LOG_EVERY_S:
            self._error_logged[name] = now
            log.warning(msg, *args, exc_info=log.isEnabledFor(logging.DEBUG))
