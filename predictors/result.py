"""The forecast result: the one object every consumer (CLI, daemon, alerts, dashboard) reads.

Its :meth:`Forecast.to_dict` is the JSON contract of ``thermeta forecast --json``; the daemon adds
``item``, ``state`` and ``updated_at`` on top.  Times inside are epoch seconds (UTC); ``to_dict``
renders the absolute ones as RFC 3339.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from datetime import UTC, datetime
from typing import Any

from thermeta.predictors.outcome import Note, NoteCode, Reason


def rfc3339(epoch_s: float | None) -> str | None:
    """Epoch seconds to an RFC 3339 UTC string with a ``Z`` (None stays None)."""
    if epoch_s is None or not math.isfinite(epoch_s):
        return None
    try:
        dt = datetime.fromtimestamp(epoch_s, tz=UTC)
    except (OverflowError, ValueError, OSError):  # beyond year 9999: no calendar date to give
        return None
    text = dt.isoformat(timespec="milliseconds" if epoch_s % 1 else "seconds")
    return text.replace("+00:00", "Z")


def _num(x: float | None) -> float | None:
    if x is None:
        return None
    x = float(x)
    return x if math.isfinite(x) else None


@dataclass
class Forecast:
    """What the fit says about one item.

    Units: seconds, and the temperature unit of the values passed in.
    ``eta_s`` counts from the newest reading (``t_last``); None means the fitted curve never
    reaches the threshold (or no fit could be made: see ``ok`` and ``reason``); 0 means already
    past it.  ``eta_lo_s``/``eta_hi_s`` bound the 90 % interval; None where it is unbounded
    (``eta_lo_s`` is inf when no curve the readings allow reaches the threshold).
    Outcomes are codes: ``reason_code`` (a :class:`Reason`) when there is no forecast, and
    ``notes`` (each a :class:`Note`: a code and its sentence); ``warnings`` are the sentences.
    """

    threshold: float
    model: str
    ambient_mode: str
    n_points: int
    t_last: float | None = None
    value_now: float | None = None
    eta_s: float | None = None
    eta_lo_s: float | None = None
    eta_hi_s: float | None = None
    k_per_s: float | None = None
    k_lo_per_s: float | None = None
    k_hi_per_s: float | None = None
    ambient: float | None = None
    ambient_lo: float | None = None
    ambient_hi: float | None = None
    biot: float | None = None
    lag_factor_j: float | None = None
    direction: str | None = None  # "rising" | "falling"
    regime_start: float | None = None
    interval_method: str | None = None
    # A shape the readings show that changes how the crossing is judged: "cycling" (a thermostat's
    # sawtooth, forecast from the drift of its cycle means); None for a plain warming/cooling curve.
    pattern: str | None = None
    rmse: float | None = None
    n_outliers: int = 0
    ok: bool = True
    reason: str | None = None
    reason_code: Reason | None = None
    notes: list[Note] = field(default_factory=list)
    # which model made the forecast and why: the weights of the candidates that were scored
    # (a single model: {model: 1.0}) and how they were judged
    model_weights: dict[str, float] = field(default_factory=dict)
    model_basis: str | None = None
    # a given ambient: its value, and whether the readings contradict it (more than 2 sd away)
    ambient_given: float | None = None
    ambient_contradicted: bool = False
    # Model parameters needed to draw the curve (t0, T0, ...), model-specific.
    params: dict[str, float] = field(default_factory=dict)
    # The model's own fit object where it can draw its curve (core models); not part of the JSON.
    model_fit: Any = field(default=None, repr=False, compare=False)

    @property
    def warnings(self) -> list[str]:
        """The notes' sentences, in order (a copy: add notes with :meth:`note`)."""
        return [n.text for n in self.notes]

    def note(self, code: NoteCode, text: str) -> None:
        """Add a remark (its code and the sentence a person reads)."""
        self.notes.append(Note(code, text))

    def drop_notes(self, *codes: NoteCode) -> None:
        """Remove the notes with these codes."""
        self.notes[:] = [n for n in self.notes if n.code not in codes]

    def has_note(self, *codes: NoteCode) -> bool:
        return any(n.code in codes for n in self.notes)

    def fail(self, code: Reason, text: str) -> Forecast:
        """No forecast: mark it failed with a reason (code and sentence); returns itself."""
        self.ok, self.reason_code, self.reason = False, code, text
        return self

    @property
    def crossing_t(self) -> float | None:
        if self.eta_s is None or self.t_last is None:
            return None
        return self.t_last + self.eta_s

    @property
    def time_constant_s(self) -> float | None:
        """tau = 1/k."""
        return None if not self.k_per_s else 1.0 / self.k_per_s

    @property
    def half_cooling_s(self) -> float | None:
        """Time for the temperature difference to the ambient to halve: ln 2 / k."""
        return None if not self.k_per_s else math.log(2.0) / self.k_per_s

    @property
    def seven_eighths_s(self) -> float | None:
        """Time for seven eighths of the difference to go: ln 8 / k (= 3 half-cooling times)."""
        return None if not self.k_per_s else math.log(8.0) / self.k_per_s

    def to_dict(self) -> dict[str, Any]:
        """The JSON contract of ``thermeta forecast --json``."""
        return {
            "eta_s": _num(self.eta_s),
            "eta_lo_s": _num(self.eta_lo_s),
            "eta_hi_s": _num(self.eta_hi_s),
            "crossing_at": rfc3339(self.crossing_t),
            "threshold": _num(self.threshold),
            "direction": self.direction,
            "k_per_s": _num(self.k_per_s),
            "k_lo_per_s": _num(self.k_lo_per_s),
            "k_hi_per_s": _num(self.k_hi_per_s),
            "time_constant_s": _num(self.time_constant_s),
            "half_cooling_s": _num(self.half_cooling_s),
            "seven_eighths_cooling_s": _num(self.seven_eighths_s),
            "lag_factor_j": _num(self.lag_factor_j),
            "ambient": _num(self.ambient),
            "ambient_lo": _num(self.ambient_lo),
            "ambient_hi": _num(self.ambient_hi),
            "ambient_mode": self.ambient_mode,
            "model": self.model,
            "pattern": self.pattern,
            "biot": _num(self.biot),
            "value_now": _num(self.value_now),
            "last_reading_at": rfc3339(self.t_last),
            "n_points": int(self.n_points),
            "n_outliers": int(self.n_outliers),
            "rmse": _num(self.rmse),
            "regime_start": rfc3339(self.regime_start),
            "interval_method": self.interval_method,
            "fit_ok": self.ok,
            "reason": self.reason,
            "reason_code": None if self.reason_code is None else str(self.reason_code),
            "warnings": self.warnings,
            "notes": [n.to_dict() for n in self.notes],
            "model_weights": {k: round(float(v), 4) for k, v in self.model_weights.items()},
            "model_basis": self.model_basis,
            "ambient_given": _num(self.ambient_given),
            "ambient_contradicted": bool(self.ambient_contradicted),
        }


def never_reason(fc: Forecast) -> tuple[NoteCode, str]:
    """Why there is no crossing: moving away from the threshold, or levelling off short of it."""
    if fc.value_now is not None and fc.direction is not None:
        away = (fc.direction == "rising") == (fc.value_now > fc.threshold)
        if away:
            return (
                NoteCode.NEVER_AWAY,
                "the readings move away from the threshold without having crossed it; "
                "give the limit's side (upper/lower) if being beyond it already counts",
            )
    return NoteCode.NEVER_LEVELS_OFF, "the fitted curve levels off before the threshold"
