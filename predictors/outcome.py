"""What a forecast says happened, as codes a program can test (the words are made from them).

A :class:`~thermeta.predictors.result.Forecast` that could not be made carries a :class:`Reason`;
every remark on one that was made is a :class:`Note`: a :class:`NoteCode` and the sentence shown
to a person.  Downstream code (the alert rules, the refitter, the command line) decides by the
codes, never by matching the sentences, which may be reworded or shown in another unit.
"""

from __future__ import annotations

from dataclasses import dataclass
from enum import StrEnum


class Reason(StrEnum):
    """Why there is no forecast (``Forecast.ok`` is False)."""

    NO_READINGS = "no_readings"
    TOO_FEW_READINGS = "too_few_readings"
    TOO_FEW_AMBIENT = "too_few_ambient_readings"
    ONE_INSTANT = "readings_at_one_instant"
    FIT_FAILED = "fit_failed"
    MODEL_UNAVAILABLE = "model_unavailable"


class NoteCode(StrEnum):
    """What a note on a forecast is about."""

    # the readings
    DUPLICATES = "duplicates_merged"
    NOT_FINITE = "readings_not_finite"
    FEW_READINGS = "few_readings"
    CORRELATED_SCATTER = "correlated_scatter"
    # the surroundings
    REGIME_CHANGE = "regime_change"  # the fit starts after a change of the surroundings
    REGIME_RETURNED = "regime_returned"  # a change that came back (a door opened and shut)
    REGIME_BEFORE_DIFFERS = "regime_before_differs"
    CYCLING = "cycling"
    CYCLING_STOPPED = "cycling_stopped"
    LOAD_CHANGED = "load_changed"  # the load changed against a measured ambient
    # the ambient
    AMBIENT_UNCERTAIN = "ambient_uncertain"  # a given ambient taken with its doubt
    AMBIENT_CONTRADICTED = "ambient_contradicted"  # the readings pull away from the given one
    AMBIENT_AT_BOUND = "ambient_at_bound"  # the fit holds the ambient at a stated bound
    AMBIENT_POORLY_KNOWN = "ambient_poorly_known"
    AMBIENT_MEASURED = "ambient_measured"
    AMBIENT_STALE = "ambient_stale"
    AMBIENT_CHANGED = "ambient_changed"
    AMBIENT_CYCLES = "ambient_cycles"
    AMBIENT_TREND_UNCLEAR = "ambient_trend_unclear"
    AMBIENT_FIT_FAILED = "ambient_fit_failed"
    FEW_AMBIENT = "few_ambient_readings"
    # the shape and the crossing
    NO_TREND = "no_trend"  # the readings do not move yet: no rate, so no point ETA
    NO_BEND = "no_bend"
    WEAK_BEND = "weak_bend"
    TREND_OVER_LEVEL_OFF = "trend_over_level_off"
    NEVER_AWAY = "never_moving_away"
    NEVER_LEVELS_OFF = "never_levels_off"
    NEVER_UNTESTED = "never_untested"  # a level-off too few readings can test: an open late end
    SLOWING = "slowing"  # the rate falls beyond one exponential: a level-off is a lower bound
    ACCELERATING = "accelerating"  # the readings speed up toward the threshold
    EARLIEST_CROSSING = "earliest_crossing"
    MODEL_CHOICE = "model_choice"
    MODEL_NOTE = "model_note"  # a remark of a model's own fit (the core-probe models)
    # learned priors
    PRIOR_USED = "prior_used"
    PRIOR_CONTRADICTED = "prior_contradicted"
    PRIOR_NOT_USED = "prior_not_used"


# the notes that say the fit's window starts at a change of the surroundings
REGIME_CODES = frozenset({NoteCode.REGIME_CHANGE, NoteCode.REGIME_RETURNED})


@dataclass(frozen=True)
class Note:
    """One remark on a forecast: its code and the sentence a person reads."""

    code: NoteCode
    text: str

    def to_dict(self) -> dict[str, str]:
        return {"code": str(self.code), "text": self.text}
