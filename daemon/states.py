"""The words of thermeta's states, each spelled once.

    ItemState     an item's state after each refit: the forecast JSON's ``"state"``, stored with it,
                  shown by the dashboard and ``thermeta status``
    AlertLevel    an alert's ``"level"``; a ``[[hook]]``'s ``levels`` filter names them
    EpisodeLevel  where the alert rules hold an item's episode between refits
    Side          which side of the threshold is past the limit (``upper``: a ceiling)
    LimitSetting  an item's ``limit`` key: a side, or ``auto`` (judged from its first reading)
    AmbientMode   where a forecast's ambient came from
    Model         the forecast models an item can name (``model``)

Members are ``StrEnum``: each equals its word, so JSON, the store and the messages carry the
words unchanged.
"""

from __future__ import annotations

from enum import StrEnum
from typing import Literal, get_args


class ItemState(StrEnum):
    """An item's state after a refit (judged in the order of ``refit.rounds.classify``)."""

    LEARNING = "learning"  # too few readings, or no fit yet
    STEADY = "steady"  # no crossing within the horizon
    APPROACHING = "approaching"  # a crossing is forecast within the horizon
    CROSSED = "crossed"  # the value is past the threshold
    STALE = "stale"  # no reading for longer than the silence limit


class AlertLevel(StrEnum):
    """The level of an alert (the order is the order config messages list them in)."""

    APPROACHING = "approaching"
    CROSSED = "crossed"
    RECOVERED = "recovered"
    STALE = "stale"
    RESUMED = "resumed"
    REGIME = "regime"  # the fit found that the surroundings changed


class EpisodeLevel(StrEnum):
    """The level of an item's alert episode, as the rules remember it."""

    CLEAR = "clear"
    APPROACHING = "approaching"
    CROSSED = "crossed"


Side = Literal["upper", "lower"]
LimitSetting = Literal["upper", "lower", "auto"]
AmbientMode = Literal["known", "fitted", "measured"]
Model = Literal["lumped", "slab", "cylinder", "sphere", "auto"]
MODELS: tuple[Model, ...] = get_args(Model)
