"""What one forecast call knows: the settings it was given and the readings it works on.

:func:`thermeta.predictors.forecast` builds one :class:`Context` per call; every model reads its
inputs from it (instead of a dozen positional arguments), and a step that narrows the readings
(a regime cut, a robust refit) makes a new one with :meth:`Context.with_readings`.
"""

from __future__ import annotations

from dataclasses import dataclass, replace
from enum import StrEnum
from typing import Any

import numpy as np
from thermeta.predictors.cleaning import Cleaned
from thermeta.predictors.prior import Prior


class AmbientMode(StrEnum):
    """Where the ambient comes from: the fit, the user (a given constant), an air probe."""

    FITTED = "fitted"
    KNOWN = "known"
    MEASURED = "measured"


@dataclass(frozen=True)
class Before:
    """The readings before a change that came back (a door), for carrying k across it:
    the whole window, the end (exclusive) of the readings before the change, and whether the
    regime search cut the window there (else a short door found inside it)."""

    t: np.ndarray
    y: np.ndarray
    end: int
    cut: bool


@dataclass(frozen=True)
class Context:
    """Settings and readings of one forecast call.  Seconds; the readings' temperature unit.

    ambient_sd: the given ambient's doubt (1 sd; 0 = exact); ambient_within: a stated bound on
    how far off it may be (a hard bound on the fitted ambient), or None.  bounds: the plausible
    range of a fitted ambient (None: a wide range around the readings).  noise_sd, quantum: the
    readings' scatter and step as the cleaning measured them.  start_s: the window's earliest
    reading, kept or not by the cleaning (the core models' episode start).
    """

    threshold: float
    limit: str | None
    mode: AmbientMode
    t: np.ndarray
    y: np.ndarray
    ambient: float | None = None
    ambient_sd: float = 0.0
    ambient_within: float | None = None
    bounds: tuple[float, float] | None = None
    prior: Prior | None = None
    min_points: int = 5
    few: bool = False
    detect: bool = True
    noise_sd: float = 0.0
    quantum: float = 0.0
    start_s: float | None = None
    air: Cleaned | None = None
    before: Before | None = None

    def with_readings(self, t: np.ndarray, y: np.ndarray, **changes: Any) -> Context:
        """The same call on other readings (a regime, the readings a robust refit keeps)."""
        return replace(self, t=t, y=y, **changes)

    @property
    def n(self) -> int:
        return int(self.t.size)

    def ambient_bounds(self) -> tuple[float, float] | None:
        """The fitted ambient's range: the stated bound around a given ambient, else ``bounds``."""
        if self.ambient is not None and self.ambient_within is not None:
            return (self.ambient - self.ambient_within, self.ambient + self.ambient_within)
        return self.bounds
