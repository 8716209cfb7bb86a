"""The round's batched lumped fits: the due items' windows read in one query per chunk, fitted
together (``predictors/batch.py``), and each item's forecast per threshold handed to the
refitter in place of a per-item ``forecast()`` call.

Which items: the lumped model with a given or fitted ambient (no ambient probe), fitted without
a learned prior.  What the batch flags (too few readings, a spike, a possible change of
surroundings, a poor fit, a doubt about one exponential, readings that do not move) and every
other item go the per-item way, which stays the reference.  ``counts`` says how many of each
went where, for the service's figures.
"""

from __future__ import annotations

import logging
from collections import Counter
from collections.abc import Sequence
from typing import Any

import numpy as np
from thermeta.daemon.config import ItemConfig
from thermeta.daemon.levels.spec import levels_of
from thermeta.daemon.units import scale_to_celsius
from thermeta.predictors.batch import Flag, Prepared, Series, prepare
from thermeta.predictors.prior import Prior
from thermeta.predictors.result import Forecast
from thermeta.storage.store import Store

log = logging.getLogger("thermeta.refit")

CHUNK = 2000  # items read and fitted together (their windows held in memory meanwhile)


def batchable(cfg: ItemConfig) -> bool:
    """Whether the batch can fit the item: the lumped model, no ambient probe."""
    return cfg.model == "lumped" and not cfg.ambient_topic


class Batch:
    """One chunk of a round: each batchable item's window and its prepared fit."""

    def __init__(self, store: Store):
        self.store = store
        self.windows: dict[int, tuple[np.ndarray, np.ndarray]] = {}
        self.prepared: dict[int, Prepared | Flag] = {}
        self.counts: Counter[str] = Counter()  # "batch", "item" and each flag

    def load(self, wanted: Sequence[tuple[int, ItemConfig, float | None]]) -> None:
        """Read and fit the chunk's items: (item_id, config, since) each."""
        self.clear()
        if not wanted:
            return
        got = self.store.windows([(iid, since) for iid, _, since in wanted])
        series: list[Series] = []
        ids: list[int] = []
        for iid, cfg, _ in wanted:
            t, y = got.get(iid, ([], []))
            ta, ya = np.asarray(t, float), np.asarray(y, float)
            self.windows[iid] = (ta, ya)
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
        if series:
            for iid, p in zip(ids, prepare(series)):
                self.prepared[iid] = p

    def clear(self) -> None:
        self.windows.clear()
        self.prepared.clear()

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
            return None
        self.counts["batch"] += 1
        return out
