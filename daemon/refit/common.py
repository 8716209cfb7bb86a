"""What the refit round shares with others: the update it hands to judges (the alert rules) and
listeners, the predictor's arguments for one item (the picture of an item passes the same), the
thinning of a dense window, and one item's refit on its way to the store.  ``rounds.py``
re-exports these names.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np
from thermeta.daemon.config import ItemConfig
from thermeta.daemon.states import ItemState, Side, predictor_side
from thermeta.daemon.units import scale_to_celsius, shown_in


@dataclass(frozen=True)
class ForecastUpdate:
    """One item's refit, as judges (the alert rules) and listeners (the demo) get it."""

    item: ItemConfig  # the item's config (a wildcard item's: made concrete for this item)
    state: ItemState
    body: dict[str, Any]  # the forecast JSON as published (the item's unit), with "state"
    previous: dict[str, Any] | None  # the item's forecast JSON before this one

    @property
    def name(self) -> str:
        return str(self.body.get("item") or self.item.name)


Listener = Callable[[ForecastUpdate], None]
Publish = Callable[[str, str], None]


def forecast_kwargs(
    cfg: ItemConfig,
    side: Side | None,
    ambient_t: np.ndarray | None = None,
    ambient_y: np.ndarray | None = None,
) -> dict[str, Any]:
    """The forecast's arguments for one item and side, as the refit passes them (the picture of
    the item passes the same, so it shows the forecast the alerts were made from); the prior
    apart."""
    kw: dict[str, Any] = {
        "model": cfg.model,
        "ambient": cfg.ambient_c,
        "ambient_t": ambient_t,
        "ambient_y": ambient_y,
        "window_s": cfg.window_s,
        "min_points": cfg.min_points,
        "limit": predictor_side(side),
        "shown": shown_in(cfg.unit),
    }  # the warnings' temperatures
    if cfg.ambient is not None and cfg.ambient_within is not None:
        kw["ambient_within"] = scale_to_celsius(cfg.ambient_within, cfg.unit)
    return kw


def uses_prior(cfg: ItemConfig, measured: bool) -> bool:
    """A learned prior serves the lumped model with a given or fitted ambient only."""
    return not measured and cfg.model in ("lumped", "auto")


def thin(t: np.ndarray, y: np.ndarray, most: int) -> tuple[np.ndarray, np.ndarray]:
    """At most ``most`` of the readings (t ascending), evenly spread, the first and newest kept."""
    if len(t) <= most:
        return t, y
    keep = np.unique(np.linspace(0, len(t) - 1, most).round().astype(int))
    return t[keep], y[keep]


@dataclass
class Refitted:
    """One item's refit, between the fit and the store (saved in chunks) and the listeners."""

    name: str
    cfg: ItemConfig
    item_id: int
    state: ItemState
    body: dict[str, Any]
    last_ts: float | None
