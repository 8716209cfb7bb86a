"""The round's batched lumped fits: the due items' windows read in one query per chunk, fitted
together (``predictors/batch.py``), and each item's forecast per threshold handed to the
refitter in place of a per-item ``forecast()`` call.

Which items: the lumped model with a given or fitted ambient (no ambient probe), fitted without
a learned prior.  What the batch flags (too few readings, a spike, a possible change of
surroundings, a poor fit, a doubt about one exponential, readings that do not move) and every
other item go the per-item way, which stays the reference.  ``counts`` says how many of each
went where, for the service's figures.

With worker processes (``[fit] workers``, ``workers.py``) the round tells :meth:`Batch.load`
the chunks that follow: they are read and handed to the workers ahead, so the workers fit the
next chunks while the service's process judges, stores and publishes this one; and where the
worker's chunk is not ready when the round needs it, the service's process fits one chunk
further ahead itself meanwhile (``chunks_here`` counts them) rather than wait.
"""

from __future__ import annotations

import logging
from collections import Counter
from collections.abc import Sequence
from concurrent.futures import Future
from typing import Any

import numpy as np
from thermeta.daemon.config import ItemConfig
from thermeta.daemon.levels.spec import auto_side, levels_of
from thermeta.daemon.refit.common import forecast_kwargs
from thermeta.daemon.refit.workers import FitPool, fit_chunk
from thermeta.daemon.units import from_celsius, scale_to_celsius
from thermeta.predictors.batch import Flag, Prepared, Series, prepare_safely
from thermeta.predictors.prior import Prior
from thermeta.predictors.result import Forecast
from thermeta.storage.store import Store

log = logging.getLogger("thermeta.refit")

CHUNK = 2000  # items read and fitted together (their windows held in memory meanwhile)


def batchable(cfg: ItemConfig) -> bool:
    """Whether the batch can fit the item: the lumped model, no ambient probe."""
    return cfg.model == "lumped" and not cfg.ambient_topic


Wanted = Sequence[tuple[int, ItemConfig, float | None]]  # (item_id, config, since) each


class _Job:
    """A chunk read and handed to a worker: its windows, series and the fits to come."""

    def __init__(self, key: tuple[int, ...], windows: dict, ids: list[int], series: list):
        self.key, self.windows, self.ids, self.series = key, windows, ids, series
        self.asks: dict[int, list[dict[str, Any]]] = {}  # per row: the per-item forecasts' args
        self.future: Any = None
        self.generation = 0


class Batch:
    """One chunk of a round: each batchable item's window and its prepared fit."""

    def __init__(self, store: Store, workers: int = 0, timeout_s: float = 60.0):
        self.store = store
        self.windows: dict[int, tuple[np.ndarray, np.ndarray]] = {}
        self.prepared: dict[int, Prepared | Flag] = {}
        self.counts: Counter[str] = Counter()  # "batch", "item" and each flag
        self.chunk = CHUNK  # items read and fitted together
        self.pool = FitPool(workers, timeout_s) if workers > 0 else None
        self.queued: list[_Job] = []  # chunks handed to the workers ahead, in order
        self.made: dict[int, list[tuple[dict[str, Any], Forecast]]] = {}  # flagged, by a worker
        # the chunks the round tells load() of ahead (rounds.py reads it): one for each worker
        # and one more, which this process fits itself while it would wait on a worker
        self.workers = workers + 1 if workers > 0 else 0

    def load(self, wanted: Wanted, ahead: Sequence[Wanted] = ()) -> None:
        """Read and fit the chunk's items: (item_id, config, since) each.  ``ahead``: the
        round's next chunks, handed to the worker processes now (when there are any)."""
        self.clear()
        if not wanted:
            return
        if self.pool is None or not (ahead or self.queued):
            job = self._read(wanted)  # one chunk in all: fitted here
            self.windows = job.windows
            self._keep(job, prepare_safely(job.series) if job.series else [])
            return
        key = tuple(iid for iid, _, _ in wanted)
        found = next((j for j in self.queued if j.key == key), None)
        job = found if found is not None else self._handed(wanted)
        self.queued = [j for j in self.queued if j is not job]
        keys = {j.key for j in self.queued}
        for w in ahead[: self.pool.workers]:
            if tuple(iid for iid, _, _ in w) not in keys:
                self.queued.append(self._handed(w))
        for w in ahead[self.pool.workers :]:
            # rather than wait on the worker, fit a chunk further ahead here
            if job.future is None or job.future.done():
                break
            if tuple(iid for iid, _, _ in w) not in keys:
                self.queued.append(self._fitted_here(w))
                self.counts["chunks_here"] += 1
        self.windows = job.windows
        got = self.pool.result(job.future, job.generation, job.series, job.asks)
        if got is None:
            self.counts["worker_lost"] += len(job.ids)
            return  # the per-item way for all of them
        prepared, made = got
        self._keep(job, prepared)
        self.made = {job.ids[i]: m for i, m in made.items()}

    def _handed(self, wanted: Wanted) -> _Job:
        assert self.pool is not None
        job = self._read(wanted, ask=True)
        job.future, job.generation = self.pool.submit(job.series, job.asks)
        return job

    def _fitted_here(self, wanted: Wanted) -> _Job:
        """A chunk ahead read and fitted in this process, as a worker fits it (``fit_chunk``:
        the flagged items' per-item forecasts made too), its result held as a done future."""
        assert self.pool is not None
        job = self._read(wanted, ask=True)
        job.future, job.generation = Future(), self.pool.generation
        try:
            job.future.set_result(fit_chunk(job.series, job.asks, self.pool.most))
        except Exception as exc:  # noqa: BLE001 - its items go the per-item way (FitPool.result)
            job.future.set_exception(exc)
        return job

    def _keep(self, job: _Job, got: list[Prepared | Flag]) -> None:
        for iid, p in zip(job.ids, got):
            self.prepared[iid] = p

    def _read(self, wanted: Wanted, ask: bool = False) -> _Job:
        """The chunk's windows in one query, and the series of its batchable items (``ask``:
        with the per-item forecasts' arguments, for a worker to make where the batch flags)."""
        got = self.store.windows([(iid, since) for iid, _, since in wanted])
        windows: dict[int, tuple[np.ndarray, np.ndarray]] = {}
        series: list[Series] = []
        ids: list[int] = []
        asks: list[list[dict[str, Any]]] = []
        for iid, cfg, _ in wanted:
            t, y = got.get(iid, ([], []))
            ta, ya = np.asarray(t, float), np.asarray(y, float)
            windows[iid] = (ta, ya)
            if not batchable(cfg):
                continue
            within = None
            if cfg.ambient is not None and cfg.ambient_within is not None:
                within = scale_to_celsius(cfg.ambient_within, cfg.unit)
            series.append(
                Series(
                    ta,
                    ya,
                    ambient=cfg.ambient_c,
                    ambient_within=within,
                    min_points=cfg.min_points,
                    thresholds=tuple(sorted({lv.threshold_c for lv in levels_of(cfg)})),
                )
            )
            ids.append(iid)
            if ask and ya.size:
                asks.append(_asks(cfg, float(ya[-1])))
            else:
                asks.append([])
        job = _Job(tuple(iid for iid, _, _ in wanted), windows, ids, series)
        job.asks = {i: a for i, a in enumerate(asks) if a}
        return job

    def drop_queued(self) -> None:
        """Forget the chunks handed ahead (the round ended before them)."""
        for j in self.queued:
            if j.future is not None:
                j.future.cancel()
        self.queued = []

    def close(self) -> None:
        self.drop_queued()
        if self.pool is not None:
            self.pool.close()

    def clear(self) -> None:
        self.windows = {}
        self.prepared.clear()
        self.made = {}

    def readings(self, item_id: int) -> tuple[np.ndarray, np.ndarray] | None:
        """The item's window as read for the round (None: not in this chunk)."""
        return self.windows.get(item_id)

    def forecast(
        self, item_id: int, threshold_c: float, prior: Prior | None, kw: dict[str, Any]
    ) -> Forecast | None:
        """The batch's forecast for one threshold, or None: the per-item way then."""
        p = self.prepared.get(item_id)
        if p is None or (prior is not None and prior.n_episodes):
            self.counts["item"] += 1
            return None
        out = (
            p if isinstance(p, Flag) else p.forecast(threshold_c, kw.get("limit"), kw.get("shown"))
        )
        if isinstance(out, Flag):
            self.counts[str(out)] += 1
            self.counts["item"] += 1
            want = {**kw, "threshold": threshold_c}
            for asked, fc in self.made.get(item_id, ()):
                if asked == want:  # a worker made the per-item forecast with these arguments
                    self.counts["item_in_worker"] += 1
                    return fc
            return None
        self.counts["batch"] += 1
        return out


def _asks(cfg: ItemConfig, value_c: float) -> list[dict[str, Any]]:
    """The per-item forecasts a round will ask of a flagged item: forecast()'s arguments for
    each distinct threshold and side (an ``auto`` side as the live value decides it)."""
    out: list[dict[str, Any]] = []
    for lv in levels_of(cfg):
        side = lv.side if lv.side != "auto" else auto_side(lv, from_celsius(value_c, cfg.unit))
        kw = {**forecast_kwargs(cfg, side), "threshold": lv.threshold_c}
        if kw not in out:
            out.append(kw)
    return out
