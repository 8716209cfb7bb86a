"""The words of thermeta's states and events, each spelled once.

The same word means the same thing in the config, the forecast JSON, the alerts, the dashboard,
``thermeta status`` and the README's vocabulary table:

    Kind          what a level asks: a ``limit`` to stay within, or a ``target`` to reach
    Side          the side of a level's threshold that counts: past a limit, or at a target, once
                  the value is ``above`` it or ``below`` it
    ItemState     a level's state (and an item's: its most pressing level's) after each refit
    Event         what an alert tells (``event`` in the alert JSON; a ``[[hook]]``'s ``events``)
    BudgetState   how a limit's allowance of time beyond it stands
    EpisodeSource who opened or closed an episode (a batch, a trip, a tray run)
    AmbientMode   where a forecast's ambient came from
    Model         the forecast models an item can name (``model``)

Members are ``StrEnum``: each equals its word, so JSON, the store and the messages carry the
words unchanged.  A state and an event of the same word are the same judgement: the alert
``approaching`` is raised when the level's state becomes ``approaching`` (one test, in
``daemon/levels/judge.py``, held by the rules in ``daemon/alerts/rules.py``).
"""

from __future__ import annotations

from enum import StrEnum
from typing import Literal, get_args

Kind = Literal["limit", "target"]
KINDS: tuple[Kind, ...] = get_args(Kind)
Side = Literal["above", "below"]
SideSetting = Literal["above", "below", "auto"]  # auto: decided once, from the live value


class ItemState(StrEnum):
    """A level's state after a refit; an item shows its most pressing level's (``RANK``)."""

    LEARNING = "learning"  # too few readings, or no fit yet
    STALE = "stale"  # no reading for longer than the silence limit (the whole item)
    WAITING = "waiting"  # a target whose deadline counts from an episode not yet started
    # a limit
    STEADY = "steady"  # inside, and the early end of the crossing interval beyond lead
    APPROACHING = "approaching"  # the early end of the crossing interval within lead
    CROSSED = "crossed"  # the value is past the limit
    # a target
    HEADING = "heading"  # forecast to reach it (by its deadline, judged by the late end)
    LATE = "late"  # the late end of the interval falls after the deadline
    SHORT = "short"  # the forecast levels off short of it: it will not be reached
    MISSED = "missed"  # the deadline passed before the target was reached
    REACHED = "reached"  # the value got to the target: good news, calm


# Most pressing first: the dashboard's order, and how an item's state is chosen from its levels.
RANK: tuple[ItemState, ...] = (
    ItemState.CROSSED,
    ItemState.MISSED,
    ItemState.APPROACHING,
    ItemState.LATE,
    ItemState.SHORT,
    ItemState.STALE,
    ItemState.LEARNING,
    ItemState.WAITING,
    ItemState.HEADING,
    ItemState.STEADY,
    ItemState.REACHED,
)
# States that ask a person to look (the dashboard's "attention only", the alerts' incidents).
ATTENTION: frozenset[ItemState] = frozenset(
    {
        ItemState.CROSSED,
        ItemState.MISSED,
        ItemState.APPROACHING,
        ItemState.LATE,
        ItemState.SHORT,
        ItemState.STALE,
    }
)
LIMIT_STATES = (ItemState.STEADY, ItemState.APPROACHING, ItemState.CROSSED)
TARGET_STATES = (
    ItemState.WAITING,
    ItemState.HEADING,
    ItemState.LATE,
    ItemState.SHORT,
    ItemState.MISSED,
    ItemState.REACHED,
)


class Event(StrEnum):
    """What an alert tells (the order is the order config messages list them in)."""

    APPROACHING = "approaching"  # a limit's state became approaching
    CROSSED = "crossed"  # a limit's state became crossed (and reminders while it stays)
    RECOVERED = "recovered"  # a warning closed: back inside, or no longer approaching/late/short
    LATE = "late"  # a target's state became late
    SHORT = "short"  # a target's state became short
    MISSED = "missed"  # a target's deadline passed
    REACHED = "reached"  # a target was reached (good news; never repeated)
    RUNNING_OUT = "running_out"  # a limit's budget is forecast to be used up within lead
    USED_UP = "used_up"  # a limit's budget is used up
    STALE = "stale"
    RESUMED = "resumed"
    REGIME = "regime"  # the fit found that the surroundings changed


# The warnings that open an incident (what ``thermeta ack`` acknowledges); the others are news.
INCIDENT_EVENTS: frozenset[Event] = frozenset(
    {Event.APPROACHING, Event.CROSSED, Event.LATE, Event.SHORT, Event.MISSED, Event.USED_UP}
)


class BudgetState(StrEnum):
    """How a limit's allowance of time beyond it stands."""

    OK = "ok"
    RUNNING_OUT = "running_out"  # at the present course, used up within lead
    USED_UP = "used_up"


class EpisodeSource(StrEnum):
    """Who opened or closed an episode."""

    PROBE = "probe"  # the probe passed the start temperature (opened) or back (closed)
    MESSAGE = "message"  # a message on the item's episode_topic
    COMMAND = "command"  # thermeta start / thermeta end
    DONE = "done"  # every target of the episode was reached (closed)
    NEXT = "next"  # the next episode started (closed)


AmbientMode = Literal["known", "fitted", "measured"]
Model = Literal["lumped", "slab", "cylinder", "sphere", "auto"]
MODELS: tuple[Model, ...] = get_args(Model)


def rank(state: str | None) -> int:
    """Where ``state`` stands in :data:`RANK` (unknown words last)."""
    try:
        return RANK.index(ItemState(state or ""))
    except ValueError:
        return len(RANK)


def predictor_side(side: Side | None) -> str | None:
    """The predictors' own word for a side: only an upward crossing counts for ``above``."""
    return None if side is None else {"above": "upper", "below": "lower"}[side]
