"""The alert rules: pure logic over one item's sequence of forecast dicts, with the time passed in.

Levels an item's episode goes through (an *episode* starts when an item leaves ``clear``):

    clear --(early end of the ETA interval within lead)--> approaching --(value past)--> crossed
      ^                                                        |                          |
      +---- early end beyond 2 x lead for hold_s ("recovered") +                          |
      +---- value inside by the hysteresis band, or inside for hold_s ("recovered") ------+

Beside the episode: ``stale`` once when the sensor falls silent (``resumed`` when it speaks
again), and ``regime`` when the fit reports that the surroundings changed at a new time.

No flapping: a level is raised once and then holds; a crossing clears by the hysteresis band (or
inside but not yet by the band, for ``hold_s``); an approach clears only when the early end of
the interval has stayed beyond a band of one more lead (2 x lead) for ``hold_s``.  While crossed,
a reminder goes out every ``remind_every_s`` unless the episode was acknowledged.

Defrost hold (common practice in the trade: temperature alarms wait through a defrost and a recovery
delay after it, because the room air swings up while the coil is heated). When the forecast carries
the item's newest defrost (``"defrost": {"started_at", "ended_at"}``, from the controller's defrost
signal, see ``daemon/ingest/defrost.py``), no new level is raised from its start until
``defrost_recovery_s`` after its end: no ``approaching``, no ``crossed``. A value still past the
threshold when the hold ends raises ``crossed`` then. A signal that never ends holds at most
``defrost_max_s`` (plus the recovery delay), so a stuck defrost signal cannot silence an item.
Levels already raised go on as before (reminders, recoveries). A change of the surroundings that the
fit finds inside the hold is the defrost itself: noted, not alerted.

Alarm delay (``delay_s``; common practice for air probes, which pass their limit for minutes at
every long door opening while the product barely moves): a new ``approaching`` or ``crossed`` is
raised only once its condition (the approach due, or the value past) has held that long, counted
from the first refit that saw it; a refit without it starts the count again.  With a delay, a
``regime`` change is told only once an episode is open, so a door opened and shut again, which
put nothing at stake, is never told.

:func:`step` is the whole engine: ``step(state, forecast, params, now, acked) -> events``; it
mutates ``state`` (a JSON-able :class:`ItemAlertState`) and returns what to send.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass, field
from typing import Any

from thermeta.daemon.states import AlertLevel, EpisodeLevel, ItemState, Side
from thermeta.daemon.timefmt import parse_time
from thermeta.predictors.outcome import REGIME_CODES

REGIME_GAP_S = 1800.0  # a change found within this of the last one is the same change, re-estimated


@dataclass(frozen=True)
class RuleParams:
    """An item's alert settings, temperatures in the item's unit, times in seconds."""

    threshold: float
    lead_s: float = 1800.0
    hysteresis: float = 0.5
    hold_s: float = 300.0
    remind_every_s: float = 1800.0
    # How long until the next refit looks again: an approach is raised when the early end of the
    # interval falls within lead + this, so the warning is never later than lead.
    check_every_s: float = 0.0
    # The defrost hold (module docstring): the recovery delay after a defrost ends, and the
    # longest a defrost may hold alerts however long its signal stays on.
    defrost_recovery_s: float = 1800.0
    defrost_max_s: float = 3600.0
    # The alarm delay: a new approaching or crossed (and a regime change) is raised only once its
    # condition has held this long; 0 raises it at the first refit that sees it.
    delay_s: float = 0.0

    def __post_init__(self) -> None:
        for name in ("lead_s", "hold_s", "remind_every_s", "defrost_max_s"):
            if not getattr(self, name) > 0:
                raise ValueError(f"{name} must be > 0, got {getattr(self, name)!r}")
        for name in ("hysteresis", "defrost_recovery_s", "delay_s"):
            if not getattr(self, name) >= 0:
                raise ValueError(f"{name} must be >= 0, got {getattr(self, name)!r}")

    @classmethod
    def of(cls, item_cfg: Any, check_every_s: float = 0.0) -> RuleParams:
        return cls(
            threshold=item_cfg.threshold,
            lead_s=item_cfg.lead_s,
            hysteresis=item_cfg.hysteresis,
            hold_s=item_cfg.hold_s,
            remind_every_s=item_cfg.remind_every_s,
            check_every_s=check_every_s,
            defrost_recovery_s=getattr(item_cfg, "defrost_recovery_s", 1800.0),
            defrost_max_s=getattr(item_cfg, "defrost_max_s", 3600.0),
            delay_s=getattr(item_cfg, "delay_s", 0.0),
        )


@dataclass
class ItemAlertState:
    """What the rules remember about one item (stored as JSON between refits and restarts)."""

    level: EpisodeLevel = EpisodeLevel.CLEAR
    episode: int = 0
    side: Side | None = (
        None  # "upper": the limit is a ceiling (warming toward it); "lower": a floor
    )
    since: float | None = None  # when the current level was entered
    crossed_at: float | None = None
    last_sent: float | None = None  # the last crossed alert or reminder
    off_since: float | None = None  # since when the current level's condition has been false
    stale: bool = False
    regime_start: float | None = None  # the newest change of the surroundings alerted on
    pending_since: float | None = None  # since when a new level's condition has held (delay)
    seq: int = 0  # counts events, so each alert has its own key

    def to_json(self) -> dict[str, Any]:
        return asdict(self)

    @classmethod
    def from_json(cls, d: dict[str, Any] | None) -> ItemAlertState:
        if not d:
            return cls()
        known = set(cls.__dataclass_fields__)
        st = cls(**{k: v for k, v in d.items() if k in known})
        st.level = EpisodeLevel(st.level)
        return st


@dataclass
class Event:
    """One alert to send: its level, whether it repeats an open crossing, and context."""

    level: AlertLevel
    reminder: bool = False
    context: dict[str, Any] = field(default_factory=dict)


def _t(text: Any) -> float | None:
    if text is None:
        return None
    if isinstance(text, (int, float)):
        return float(text)
    try:
        return parse_time(str(text))
    except ValueError:
        return None


def remaining_s(fc: dict[str, Any], key: str, now: float) -> float | None:
    """An ETA of the forecast counted from ``now`` instead of from its newest reading."""
    eta = fc.get(key)
    if eta is None:
        return None
    t_last = _t(fc.get("last_reading_at"))
    elapsed = 0.0 if t_last is None else max(0.0, now - t_last)
    return max(0.0, float(eta) - elapsed)


def side_of(fc: dict[str, Any], threshold: float) -> Side | None:
    """Which side of the threshold is unsafe, judged when the item is first seen: an item starts
    inside its limit, so below the threshold the limit is a ceiling ("upper"), above it a floor.
    (The fitted direction alone is not trusted: an early fit on a few noisy readings can point
    either way.)"""
    v = fc.get("value_now")
    if v is None or v == threshold:
        return None
    return "upper" if v < threshold else "lower"


def is_past(v: float, side: Side, threshold: float) -> bool:
    return v >= threshold if side == "upper" else v <= threshold


def is_inside(v: float, side: Side, threshold: float, band: float = 0.0) -> bool:
    # upper limit: back inside when v <= threshold - band; lower: v >= threshold + band
    return v <= threshold - band if side == "upper" else v >= threshold + band


def approach_due(fc: dict[str, Any], p: RuleParams, now: float) -> bool:
    """A crossing is forecast within the horizon and the EARLY end of its interval within lead
    (plus the time to the next look)."""
    if fc.get("state") != ItemState.APPROACHING or not fc.get("fit_ok", True):
        return False
    early = remaining_s(fc, "eta_lo_s", now)
    if early is None:
        early = remaining_s(fc, "eta_s", now)
    return early is not None and early <= p.lead_s + p.check_every_s


def approach_eased(fc: dict[str, Any], p: RuleParams, now: float) -> bool:
    """The approach no longer holds: no crossing forecast, or its early end beyond a band of one
    more lead (lead + lead), so an estimate wandering about the lead does not flap."""
    if fc.get("state") not in (ItemState.APPROACHING, ItemState.CROSSED):
        return fc.get("state") != ItemState.LEARNING  # no fit yet is no news: hold the level
    early = remaining_s(fc, "eta_lo_s", now)
    if early is None:
        early = remaining_s(fc, "eta_s", now)
    return early is None or early > 2.0 * p.lead_s + p.check_every_s


def defrost_hold_until(fc: dict[str, Any], p: RuleParams) -> tuple[float, float] | None:
    """(start, end) of the hold of the forecast's newest defrost, or None without one: from the
    defrost's start to its end (at most ``defrost_max_s`` after the start; a signal still on counts
    as ending then) plus the recovery delay."""
    d = fc.get("defrost")
    if not isinstance(d, dict):
        return None
    start = _t(d.get("started_at"))
    if start is None:
        return None
    end = _t(d.get("ended_at"))
    cut = start + p.defrost_max_s
    end = cut if end is None else min(max(end, start), cut)
    return start, end + p.defrost_recovery_s


def in_defrost_hold(fc: dict[str, Any], p: RuleParams, now: float) -> bool:
    span = defrost_hold_until(fc, p)
    return span is not None and span[0] <= now < span[1]


def step(
    st: ItemAlertState, fc: dict[str, Any], p: RuleParams, now: float, acked: bool = False
) -> list[Event]:
    """Advance ``st`` by one forecast; return the alerts it raises (often none)."""
    events: list[Event] = []
    state = fc.get("state")
    if state == ItemState.STALE:
        if not st.stale:
            st.stale = True
            events.append(Event(AlertLevel.STALE))
        return events  # no readings: nothing else can be judged
    if st.stale:
        st.stale = False
        events.append(Event(AlertLevel.RESUMED))
    held = in_defrost_hold(fc, p, now)
    if p.delay_s <= 0:
        return events + _regime(st, fc, p, now, held) + _levels(st, fc, p, now, held, acked)
    # with an alarm delay, a change of the surroundings is told once it has opened an episode
    levels = _levels(st, fc, p, now, held, acked)
    return events + _regime(st, fc, p, now, held) + levels


def _levels(
    st: ItemAlertState, fc: dict[str, Any], p: RuleParams, now: float, held: bool, acked: bool
) -> list[Event]:
    """The episode's levels: approaching, crossed (with reminders) and recovered."""
    events: list[Event] = []
    v = fc.get("value_now")
    if v is None:
        return events
    v = float(v)
    thr = p.threshold
    if st.level == EpisodeLevel.CLEAR:
        # The unsafe side is learnt from the first travel toward the limit and then kept: a load
        # cooling back down after a crossing is recovering, not heading for a floor.
        # The daemon's own judgement (``limit``: configured, or from the first reading) wins.
        limit = fc.get("limit")
        side: Side | None = limit if limit in ("upper", "lower") else None
        side = side or st.side or side_of(fc, thr)
        if side is None:
            return events
        st.side = side
        if held:
            st.pending_since = None
            return events  # a defrost and its recovery delay raise nothing new
        want = (
            EpisodeLevel.CROSSED
            if is_past(v, side, thr)
            else EpisodeLevel.APPROACHING
            if approach_due(fc, p, now)
            else None
        )
        if want is None:
            st.pending_since = None
        elif _delay_over(st, p, now):
            _enter(st, want, side, now, new_episode=True)
            events.append(Event(AlertLevel(want)))
        return events
    side = st.side or side_of(fc, thr) or "upper"
    if st.level == EpisodeLevel.APPROACHING:
        if is_past(v, side, thr) and held:
            st.off_since = st.pending_since = None  # the crossing waits for the end of the hold
        elif is_past(v, side, thr):
            st.off_since = None
            if _delay_over(st, p, now):
                _enter(st, EpisodeLevel.CROSSED, side, now)
                events.append(Event(AlertLevel.CROSSED))
        elif not approach_eased(fc, p, now):
            st.off_since = st.pending_since = None
        else:
            st.pending_since = None
            st.off_since = st.off_since if st.off_since is not None else now
            if now - st.off_since >= p.hold_s:
                events.append(
                    Event(AlertLevel.RECOVERED, context={"from_level": EpisodeLevel.APPROACHING})
                )
                _clear(st)
        return events
    # crossed
    if is_inside(v, side, thr, p.hysteresis):
        events.append(
            Event(
                AlertLevel.RECOVERED,
                context={
                    "from_level": EpisodeLevel.CROSSED,
                    "by": "band",
                    "crossed_at_s": st.crossed_at,
                },
            )
        )
        _clear(st)
    elif is_inside(v, side, thr):
        st.off_since = st.off_since if st.off_since is not None else now
        if now - st.off_since >= p.hold_s:
            events.append(
                Event(
                    AlertLevel.RECOVERED,
                    context={
                        "from_level": EpisodeLevel.CROSSED,
                        "by": "hold",
                        "crossed_at_s": st.crossed_at,
                    },
                )
            )
            _clear(st)
    else:
        st.off_since = None
        if not acked and st.last_sent is not None and now - st.last_sent >= p.remind_every_s:
            st.last_sent = now
            events.append(Event(AlertLevel.CROSSED, reminder=True))
    return events


def _delay_over(st: ItemAlertState, p: RuleParams, now: float) -> bool:
    """The alarm delay: True once a new level's condition has held ``delay_s`` (counted from the
    first refit that saw it; any refit without it starts the count again)."""
    if st.pending_since is None:
        st.pending_since = now
    return now - st.pending_since >= p.delay_s


def _regime(
    st: ItemAlertState, fc: dict[str, Any], p: RuleParams, now: float, held: bool = False
) -> list[Event]:
    # The fit notes a change of the surroundings and starts its window there; the estimate of
    # that moment wanders as readings arrive, so only a start later than the last one alerted on
    # by more than REGIME_GAP_S (or the hold time) counts as new.  A change inside a defrost
    # hold is taken note of without an alert (the defrost is the change).  With an alarm delay,
    # a change waits until an episode is open (approaching or crossed, each past its delay):
    # a door opened for a minute and shut again, which puts nothing at stake, is never told.
    notes = fc.get("notes") or []
    if not any(n.get("code") in REGIME_CODES for n in notes):
        return []
    start = _t(fc.get("regime_start"))
    if start is None:
        return []
    if st.regime_start is not None and start <= st.regime_start + max(p.hold_s, REGIME_GAP_S):
        return []
    if held:
        st.regime_start = start
        return []
    if p.delay_s > 0 and st.level == EpisodeLevel.CLEAR:
        return []  # nothing at stake (yet): judged again at the next refit
    st.regime_start = start
    return [Event(AlertLevel.REGIME, context={"regime_start": start})]


def _enter(
    st: ItemAlertState, level: EpisodeLevel, side: Side, now: float, new_episode: bool = False
) -> None:
    if new_episode:
        st.episode += 1
    st.level, st.side, st.since, st.off_since, st.pending_since = level, side, now, None, None
    if level == EpisodeLevel.CROSSED:
        st.crossed_at = now
        st.last_sent = now


def _clear(st: ItemAlertState) -> None:
    st.level, st.since, st.off_since = EpisodeLevel.CLEAR, None, None
    st.last_sent, st.crossed_at = None, None
    st.pending_since = None
