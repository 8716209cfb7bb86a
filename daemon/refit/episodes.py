"""An item's episodes and sides, as the refit keeps them (the rule in ``rounds.py``'s docstring).

    keeper = EpisodeKeeper(store)
    keeper.load()                                   # each round: the open episodes
    keeper.preload(names)                           # a chunk's sides and last episodes at once
    sides = keeper.sides(name, cfg, levels, value_c, now)
    ep = keeper.episode(name, cfg, levels, t, y)    # open, or opened/closed by the probe, or last
    tally = keeper.tally(name, levels, sides, ep, item_id)
    keeper.keep_record(name, cfg, levels, ep, tally, body)

Episodes may also be opened and closed beside the refit (``thermeta start``/``end``, messages);
each round reads the open ones again.

A side decided in a round is used at once and stored by :meth:`EpisodeKeeper.write_sides` with
the chunk's forecasts, in their transaction (a round's first after a start decides one for each
``auto`` level of each item: one transaction each would cost an fsync each); a crash before that
loses the decision with the forecasts judged from it, and the next round decides again.
"""

from __future__ import annotations

import logging
import math
from typing import Any

import numpy as np
from thermeta.daemon.config import ItemConfig
from thermeta.daemon.levels.spec import Level, auto_side
from thermeta.daemon.levels.tally import Tally, new_tally
from thermeta.daemon.states import EpisodeSource, Side
from thermeta.daemon.units import from_celsius, to_celsius
from thermeta.storage.episodes import Episode, EpisodeStore
from thermeta.storage.store import Store

log = logging.getLogger("thermeta.refit")

# An episode opened by the probe passing its start closes when the probe goes back past the
# start by this much (the next batch), so readings wandering about the start do not flap.
START_BAND_C = 3.0


class EpisodeKeeper:
    """The open (and last) episode of each item, their tallies, and the levels' sides."""

    def __init__(self, store: Store):
        self.store = store
        self.episodes = EpisodeStore(store)
        self.open_eps: dict[str, Episode] = {}
        self.last_eps: dict[str, Episode | None] = {}  # each item's newest closed episode
        self.tallies: dict[str, tuple[int, Tally]] = {}  # by item: (episode id, its tally)
        self.recorded: dict[str, dict[str, Side]] = {}  # by item: the recorded sides
        # by item: the last reading scanned for a start, and a pass of it waiting to be confirmed
        self.scanned: dict[str, tuple[tuple[float, float], float | None]] = {}
        self.unrecorded: list[tuple[str, str, Side, float, float | None]] = []  # sides to store

    def load(self) -> None:
        """The open episodes (``thermeta start`` and messages change them beside the refit)."""
        try:
            opened = self.episodes.open_episodes()
        except Exception:  # noqa: BLE001 - judged with the episodes known so far
            log.exception("reading the open episodes failed")
            return
        for name, ep in self.open_eps.items():
            if name not in opened or opened[name].id != ep.id:
                self.last_eps.pop(name, None)  # closed beside us: read it again when needed
        self.open_eps = opened

    def preload(self, names: list[str]) -> None:
        """The recorded sides and the newest episode of the items not known yet, two queries
        for all (a round's first after a start would otherwise read two rows per item)."""
        want = [n for n in names if n not in self.recorded]
        if want:
            try:
                self.recorded.update(self.episodes.sides_of(want))  # type: ignore[arg-type]
            except Exception:  # noqa: BLE001 - read one by one at their first use
                log.exception("reading the sides of %d items failed", len(want))
        want = [n for n in names if n not in self.last_eps and n not in self.open_eps]
        if want:
            try:
                newest = self.episodes.newest_of(want)
            except Exception:  # noqa: BLE001 - read one by one at their first use
                log.exception("reading the episodes of %d items failed", len(want))
                return
            for n in want:
                self.last_eps[n] = newest.get(n)

    # -- sides -----------------------------------------------------------------------------------
    def sides(
        self,
        name: str,
        cfg: ItemConfig,
        levels: tuple[Level, ...],
        value_c: float | None,
        now: float,
    ) -> dict[str, Side | None]:
        """Each level's side: configured, or recorded, or (first judged now) decided from the
        live value and recorded (stored by :meth:`write_sides`); never re-derived from stored
        history."""
        if name not in self.recorded:
            try:
                self.recorded[name] = {k: v for k, v in self.episodes.sides(name).items()}  # type: ignore[misc]
            except Exception:  # noqa: BLE001 - decided again below, recorded when the store is back
                log.exception("reading the sides of %s failed", name)
                self.recorded[name] = {}
        known = self.recorded[name]
        out: dict[str, Side | None] = {}
        for lv in levels:
            if lv.side != "auto":
                out[lv.name] = lv.side
                continue
            if lv.name not in known and value_c is not None:
                side = auto_side(lv, from_celsius(value_c, cfg.unit))
                if side is not None:
                    known[lv.name] = side  # type: ignore[assignment]
                    self.unrecorded.append((name, lv.name, side, now, value_c))  # type: ignore[arg-type]
            out[lv.name] = known.get(lv.name)
        return out

    def write_sides(self) -> None:
        """Store the sides decided since the last call (inside a batch: in its transaction;
        kept for the next call if that is rolled back or one cannot be stored).  A side found
        recorded already (by another daemon) is the one kept from then on."""
        if not self.unrecorded:
            return
        taken, self.unrecorded = self.unrecorded, []
        try:
            kept = self.episodes.decide_sides(taken)
        except Exception:  # noqa: BLE001 - stored with the next chunk
            log.exception("recording the sides of %d levels failed", len(taken))
            self.unrecorded[:0] = taken
            return
        self.store.on_rollback(lambda: self.unrecorded.__setitem__(slice(0, 0), taken))
        for (name, level), side in kept.items():
            self.recorded.setdefault(name, {})[level] = side  # type: ignore[assignment]

    def episode(
        self,
        name: str,
        cfg: ItemConfig,
        levels: tuple[Level, ...],
        t: np.ndarray,
        y: np.ndarray,
        now: float,
    ) -> Episode | None:
        """The item's open episode (opened or closed here by its start temperature), else its
        newest closed one (shown until the next starts), else None."""
        ep = self.open_eps.get(name)
        if cfg.start is not None and len(t):
            try:
                ep = self._by_probe(name, cfg, levels, t, y, ep)
            except Exception:  # noqa: BLE001 - the episode waits for the next refit
                log.exception("opening or closing an episode of %s failed", name)
        if ep is not None:
            return ep
        if name not in self.last_eps:
            try:
                past = self.episodes.of_item(name)
            except Exception:  # noqa: BLE001
                log.exception("reading the episodes of %s failed", name)
                return None
            self.last_eps[name] = past[-1] if past else None
        return self.last_eps[name]

    def _by_probe(
        self,
        name: str,
        cfg: ItemConfig,
        levels: tuple[Level, ...],
        t: np.ndarray,
        y: np.ndarray,
        ep: Episode | None,
    ) -> Episode | None:
        """Open an episode when the probe passes the start heading for the targets; close the
        open one when it goes back past the start by START_BAND_C."""
        start_c = to_celsius(float(cfg.start or 0.0), cfg.unit)
        falling = any(lv.threshold_c < start_c for lv in levels if lv.is_target)
        sign = 1.0 if falling else -1.0  # > 0: on the start's near side
        last = self.episodes_floor(name, ep)
        prev, crossed_at = self.scanned.get(name, (None, None))
        order = np.argsort(t, kind="stable")
        for ti, vi in zip(t[order], y[order]):
            ti, vi = float(ti), float(vi)
            if prev is not None and ti <= prev[0]:
                continue
            if ep is not None and ep.closed_at is None:
                if sign * (vi - start_c) >= START_BAND_C:
                    self.episodes.end(name, ti, EpisodeSource.PROBE)
                    ep.closed_at, ep.closed_by = ti, EpisodeSource.PROBE
                    self.open_eps.pop(name, None)
                    self.last_eps[name] = ep
                    ep, last = None, ti
            elif sign * (vi - start_c) > 0:
                crossed_at = None  # on the near side (again): a pass before was a stray reading
            elif crossed_at is not None:
                # the pass is confirmed by this reading, also past the start: open the episode
                if crossed_at > last:
                    eid = self.episodes.start(name, crossed_at, EpisodeSource.PROBE)
                    ep = Episode(eid, name, None, None, crossed_at, EpisodeSource.PROBE)
                    self.open_eps[name] = ep
                    last = crossed_at
                    log.info("%s: episode %d started at %.1f degC", name, eid, start_c)
                crossed_at = None
            elif prev is not None and sign * (prev[1] - start_c) > 0:
                # t = t0 + (start - v0) / (v1 - v0) (t1 - t0)
                crossed_at = prev[0] + (start_c - prev[1]) / (vi - prev[1]) * (ti - prev[0])
            prev = (ti, vi)
        if prev is not None:
            self.scanned[name] = (prev, crossed_at)
        return ep

    def episodes_floor(self, name: str, ep: Episode | None) -> float:
        """The newest episode's start: a crossing of the start before it was already counted."""
        if ep is not None:
            return ep.opened_at
        closed = self.last_eps.get(name)
        if closed is None and name not in self.last_eps:
            past = self.episodes.of_item(name)
            closed = self.last_eps[name] = past[-1] if past else None
        return -math.inf if closed is None else max(closed.opened_at, closed.closed_at or 0.0)

    def tally(
        self,
        name: str,
        levels: tuple[Level, ...],
        sides: dict[str, Side | None],
        ep: Episode,
        item_id: int,
        t: np.ndarray,
    ) -> Tally:
        """The episode's tally, folded forward from the readings since it was last brought up to
        date (built from the store at its first use, e.g. after a restart)."""
        kept = self.tallies.get(name)
        want = {lv.name for lv in levels if sides.get(lv.name) is not None}
        tl = kept[1] if kept is not None and kept[0] == ep.id else None
        if tl is not None and set(tl.excursions) | set(tl.targets) != want:
            tl = None  # a side was decided since: count again with it
        if tl is None:
            tl = new_tally(levels, sides, ep.opened_at)
            self.tallies[name] = (ep.id, tl)
        start = tl.last_t if tl.last_t is not None else ep.opened_at
        if ep.closed_at is not None and tl.last_t is not None and tl.last_t >= ep.closed_at:
            return tl
        rows = self.store.recent_readings(item_id, since_ts=start, until_ts=ep.closed_at)
        tl.add([r[0] for r in rows], [r[1] for r in rows])
        return tl

    def period(
        self,
        name: str,
        cfg: ItemConfig,
        levels: tuple[Level, ...],
        sides: dict[str, Side | None],
        item_id: int,
        now: float,
    ) -> Tally:
        """The rolling period's tally (for budgets when no episode is open)."""
        tl = new_tally(levels, sides, now - cfg.period_s)
        rows = self.store.recent_readings(item_id, since_ts=now - cfg.period_s, until_ts=now)
        tl.add([r[0] for r in rows], [r[1] for r in rows])
        return tl

    def keep_record(
        self,
        name: str,
        cfg: ItemConfig,
        levels: tuple[Level, ...],
        ep: Episode,
        tally: Tally,
        body: dict[str, Any],
    ) -> None:
        """Keep the episode's record (its stages and tally) in the store when it changed, and
        close it when every target has been reached."""
        stages = {
            d["name"]: {
                "threshold": d["threshold"],
                "stage": d.get("stage"),
                "deadline_at": d.get("deadline_at"),
                "reached_at": d.get("reached_at"),
                "made": None
                if d.get("deadline_at_s") is None
                else (
                    d.get("reached_at_s") is not None and d["reached_at_s"] <= d["deadline_at_s"]
                ),
            }
            for d in body.get("levels", [])
            if d["kind"] == "target"
        }
        targets = [lv.name for lv in levels if lv.is_target]
        done = ep.closed_at is None and targets and all(n in tally.reached for n in targets)
        record: dict[str, Any] = {"stages": stages, "tally": tally.to_json(cfg.unit)}
        reached_before = {
            k: v.get("reached_at") for k, v in (ep.record.get("stages") or {}).items()
        }
        changed = reached_before != {k: v["reached_at"] for k, v in stages.items()}
        if not (changed or done) and ep.record:
            if ep.closed_at is not None or tally.last_t is None:
                return
            if tally.last_t - float(ep.record.get("saved_t") or 0.0) < 600.0:
                return  # the figures move each reading; kept every 10 min, and at each change
        record["saved_t"] = tally.last_t
        try:
            self.episodes.save_record(ep.id, record)
            ep.record = record
            if done:
                at = max(tally.reached[n] for n in targets)
                self.episodes.end(name, at, EpisodeSource.DONE)
                ep.closed_at, ep.closed_by = at, EpisodeSource.DONE
                self.open_eps.pop(name, None)
                self.last_eps[name] = ep
                body["episode"].update(ended_at=ep.to_json()["ended_at"], ended_by=ep.closed_by)
        except Exception:  # noqa: BLE001 - kept at the next refit
            log.exception("keeping the record of episode %d of %s failed", ep.id, name)
