"""The alert rules: pure logic over one item's sequence of forecast dicts, with the time passed in.

Each level's state is judged at each refit (``daemon/levels/judge.py``: the one test behind each
word); the rules HOLD those judgements so nothing flaps, raise an event when a held state changes,
and write the held states back into the forecast, which the refit then stores and publishes: the
state shown and the alert sent are one decision.

A limit (per level):

    steady --(approaching: early end within lead)--> approaching --(value past)--> crossed
      ^                                                  |                            |
      +--- early end beyond 2 x lead for hold ("recovered")                           |
      +--- value back inside by the hysteresis band, or inside for hold ("recovered") +

While crossed, a reminder goes out every ``remind_every`` unless the incident was acknowledged.

A target (per level): ``heading`` (or ``waiting``, ``learning``) is calm; ``late`` and ``short``
are raised once and held until the forecast has been on course again, with half a lead to spare,
for ``hold`` ("recovered"); ``missed`` is raised when the deadline passes; ``reached`` is raised
once, never repeated, and holds until the next episode (or, with no episode kept, until the value
has stayed back on the far side by the hysteresis band for ``hold``).  A limit's budget raises
``running_out`` and ``used_up`` once each.

An *incident* (what ``thermeta ack`` acknowledges) opens with the first warning while none is
open and closes when no level needs attention any more.

Beside the levels: ``stale`` once when the sensor falls silent (``resumed`` when it speaks
again), and ``regime`` when the fit reports that the surroundings changed at a new time (not for
an item whose levels are all targets on course or reached: nothing is at stake then).

Defrost hold (common practice in the trade: temperature alarms wait through a defrost and a recovery
delay after it, because the room air swings up while the coil is heated). When the forecast carries
the item's newest defrost (``"defrost": {"started_at", "ended_at"}``, from the controller's defrost
signal, see ``daemon/ingest/defrost.py``), no new warning is raised from its start until
``defrost_recovery_s`` after its end.  A value still past the threshold when the hold ends raises
``crossed`` then.  A signal that never ends holds at most ``defrost_max_s`` (plus the recovery
delay), so a stuck defrost signal cannot silence an item.  Warnings already raised go on as before
(reminders, recoveries).  A change of the surroundings that the fit finds inside the hold is the
defrost itself: noted, not alerted.

Alarm delay (``delay_s``; common practice for air probes, which pass their limit for minutes at
every long door opening while the product barely moves): a new warning is raised only once its
condition has held that long, counted from the first refit that saw it; a refit without it starts
the count again.  With a delay, a ``regime`` change is told only once an incident is open, so a
door opened and shut again, which put nothing at stake, is never told.

:func:`step` is the whole engine: ``step(state, forecast, params, now, acked) -> raised``; it
mutates ``state`` (a JSON-able :class:`ItemAlertState`) and the forecast's states.
"""

from __future__ import annotations

from typing import Any

from thermeta.daemon.alerts.memory import ItemAlertState, LevelMemory, Raised, RuleParams
from thermeta.daemon.levels.judge import LevelView, epoch, judge, remaining_s
from thermeta.daemon.levels.spec import Level, auto_side
from thermeta.daemon.states import (
    ATTENTION,
    INCIDENT_EVENTS,
    BudgetState,
    Event,
    ItemState,
    rank,
)
from thermeta.predictors.outcome import REGIME_CODES

__all__ = [
    "ItemAlertState",
    "LevelMemory",
    "Raised",
    "RuleParams",
    "defrost_hold_until",
    "remaining_s",
    "step",
]

REGIME_GAP_S = 1800.0  # a change found within this of the last one is the same change, re-estimated
CALM_TARGET = (ItemState.HEADING, ItemState.WAITING, ItemState.LEARNING)


def defrost_hold_until(fc: dict[str, Any], p: RuleParams) -> tuple[float, float] | None:
    """(start, end) of the hold of the forecast's newest defrost, or None without one: from the
    defrost's start to its end (at most ``defrost_max_s`` after the start; a signal still on counts
    as ending then) plus the recovery delay."""
    d = fc.get("defrost")
    if not isinstance(d, dict):
        return None
    start = epoch(d.get("started_at"))
    if start is None:
        return None
    end = epoch(d.get("ended_at"))
    cut = start + p.defrost_max_s
    end = cut if end is None else min(max(end, start), cut)
    return start, end + p.defrost_recovery_s


def in_defrost_hold(fc: dict[str, Any], p: RuleParams, now: float) -> bool:
    span = defrost_hold_until(fc, p)
    return span is not None and span[0] <= now < span[1]


# -- the engine ---------------------------------------------------------------------------------
def step(
    st: ItemAlertState, fc: dict[str, Any], p: RuleParams, now: float, acked: bool = False
) -> list[Raised]:
    """Advance ``st`` by one forecast; return the alerts it raises (often none).

    ``fc`` is the item's forecast JSON: its ``levels`` as judged by the refit (a forecast without
    them is judged here as one limit at ``p.threshold``).  The held states are written back into
    ``fc`` (each level's ``state``, and the item's ``state``: its most pressing level's)."""
    raised: list[Raised] = []
    if fc.get("state") == ItemState.STALE:
        if not st.stale:
            st.stale = True
            raised.append(Raised(Event.STALE))
        return raised  # no readings: nothing else can be judged
    if st.stale:
        st.stale = False
        raised.append(Raised(Event.RESUMED))
    views = _views(st, fc, p, now)
    if "*" in st.levels and views and views[0][0].name not in st.levels:
        st.levels[views[0][0].name] = st.levels.pop("*")  # an older version's one level
    held = in_defrost_hold(fc, p, now)
    level_events: list[Raised] = []
    for view, doc in views:
        mem = st.levels.setdefault(view.name, LevelMemory())
        episode = doc.get("episode")
        if mem.episode != episode and view.kind == "target":
            # a new episode: the target is asked afresh
            st.levels[view.name] = mem = LevelMemory(episode=episode)
        mem.episode = episode
        if view.kind == "target":
            level_events += _target(mem, view, p, now, held)
        else:
            level_events += _limit(mem, view, p, now, held, acked)
        level_events += _budget(mem, view, doc)
        doc["judged"] = view.state
        doc["state"] = mem.state
    for ev in level_events:
        if ev.event in INCIDENT_EVENTS and not ev.reminder and not st.incident_open:
            st.incident += 1
            st.incident_open = True
    if st.incident_open and not st.open_states and not _budget_open(st):
        st.incident_open = False
    names = {v.name for v, _ in views}
    for gone in set(st.levels) - names:
        del st.levels[gone]  # a level no longer configured
    _item_state(fc, st, views)
    # targets only, none in trouble: a change of the surroundings (the chilling started or
    # stopped, the tray moved to holding) is the process itself and puts nothing at stake
    calm = bool(views) and all(
        v.kind == "target" and st.levels[v.name].state not in ATTENTION for v, _ in views
    )
    regime = _regime(st, fc, p, now, held or calm)
    return raised + regime + level_events


def _budget_open(st: ItemAlertState) -> bool:
    return any(m.budget == BudgetState.USED_UP for m in st.levels.values())


def _item_state(
    fc: dict[str, Any], st: ItemAlertState, views: list[tuple[LevelView, dict]]
) -> None:
    """The item's state is its most pressing level's held state; its focus is that level."""
    if not views:
        return
    best = min(range(len(views)), key=lambda i: (rank(views[i][1]["state"]), i))
    fc["state"] = views[best][1]["state"]
    fc["focus"] = views[best][0].name


def _views(st: ItemAlertState, fc: dict[str, Any], p: RuleParams, now: float):
    """Each level's judgement and its JSON in ``fc`` (made here for a forecast without levels)."""
    docs = fc.get("levels")
    if isinstance(docs, list) and docs and fc.get("levels_from") != "rules":
        return [(_view_of(d), d) for d in docs]
    if p.threshold is None:
        return []
    level = Level(
        name="limit",
        kind="limit",
        threshold=float(p.threshold),
        threshold_c=float(p.threshold),
        side=p.side or "auto",
        lead_s=p.lead_s,
    )
    if "*" in st.levels and level.name not in st.levels:
        st.levels[level.name] = st.levels.pop("*")
    mem = st.levels.setdefault(level.name, LevelMemory())
    side = fc.get("side") if fc.get("side") in ("above", "below") else None
    # the side, once decided, is kept: a load cooling back after a crossing is recovering
    mem.side = side or mem.side or auto_side(level, fc.get("value_now"))
    view = judge(
        level,
        fc,
        mem.side,
        now,
        hysteresis=p.hysteresis,
        check_every_s=p.check_every_s,
        horizon_s=p.horizon_s,
    )
    doc = view.to_json(now)
    fc["levels"], fc["levels_from"] = [doc], "rules"  # judged here: judged afresh next time
    return [(view, doc)]


def _view_of(d: dict[str, Any]) -> LevelView:
    known = set(LevelView.__dataclass_fields__)
    v = LevelView(**{k: d[k] for k in known if k in d})
    v.state = ItemState(v.judged if v.judged else v.state)
    return v


def _delay_over(mem: LevelMemory, p: RuleParams, now: float) -> bool:
    """The alarm delay: True once a new warning's condition has held ``delay_s`` (counted from
    the first refit that saw it; any refit without it starts the count again)."""
    if mem.pending_since is None:
        mem.pending_since = now
    return now - mem.pending_since >= p.delay_s


def _enter(mem: LevelMemory, state: ItemState, now: float) -> None:
    mem.state, mem.since, mem.off_since, mem.pending_since = state, now, None, None
    if state == ItemState.CROSSED:
        mem.crossed_at = mem.last_sent = now


def _calm(mem: LevelMemory, judged: ItemState, calm: ItemState) -> None:
    mem.state = judged if judged in (calm, ItemState.LEARNING, ItemState.WAITING) else calm
    mem.since = mem.off_since = mem.pending_since = None
    mem.last_sent = mem.crossed_at = None


def _limit(
    mem: LevelMemory, v: LevelView, p: RuleParams, now: float, held: bool, acked: bool
) -> list[Raised]:
    name = v.name
    if mem.state not in (ItemState.APPROACHING, ItemState.CROSSED):
        if held:
            mem.pending_since = None
            _calm(mem, v.state, ItemState.STEADY)
            return []  # a defrost and its recovery delay raise nothing new
        want = ItemState.CROSSED if v.past else ItemState.APPROACHING if v.due else None
        if want is None:
            _calm(mem, v.state, ItemState.STEADY)
            return []
        if not _delay_over(mem, p, now):
            pending = mem.pending_since
            _calm(mem, v.state, ItemState.STEADY)
            mem.pending_since = pending
            return []
        _enter(mem, want, now)
        return [Raised(Event(want), name)]
    if mem.state == ItemState.APPROACHING:
        if v.past and held:
            mem.off_since = mem.pending_since = None  # the crossing waits for the end of the hold
        elif v.past:
            mem.off_since = None
            if _delay_over(mem, p, now):
                _enter(mem, ItemState.CROSSED, now)
                return [Raised(Event.CROSSED, name)]
        elif not v.eased:
            mem.off_since = mem.pending_since = None
        else:
            mem.pending_since = None
            mem.off_since = mem.off_since if mem.off_since is not None else now
            if now - mem.off_since >= p.hold_s:
                _calm(mem, v.state, ItemState.STEADY)
                return [
                    Raised(Event.RECOVERED, name, context={"from_state": ItemState.APPROACHING})
                ]
        return []
    # crossed
    if v.back:
        crossed_at = mem.crossed_at
        _calm(mem, v.state, ItemState.STEADY)
        return [
            Raised(
                Event.RECOVERED,
                name,
                context={"from_state": ItemState.CROSSED, "by": "band", "crossed_at_s": crossed_at},
            )
        ]
    if not v.past:
        mem.off_since = mem.off_since if mem.off_since is not None else now
        if now - mem.off_since >= p.hold_s:
            crossed_at = mem.crossed_at
            _calm(mem, v.state, ItemState.STEADY)
            return [
                Raised(
                    Event.RECOVERED,
                    name,
                    context={
                        "from_state": ItemState.CROSSED,
                        "by": "hold",
                        "crossed_at_s": crossed_at,
                    },
                )
            ]
        return []
    mem.off_since = None
    if not acked and mem.last_sent is not None and now - mem.last_sent >= p.remind_every_s:
        mem.last_sent = now
        return [
            Raised(Event.CROSSED, name, reminder=True, context={"crossed_at_s": mem.crossed_at})
        ]
    return []


def _target(mem: LevelMemory, v: LevelView, p: RuleParams, now: float, held: bool) -> list[Raised]:
    name, j = v.name, v.state
    ctx = {"deadline_at_s": v.deadline_at_s, "stage": v.stage}
    if mem.state == ItemState.REACHED:
        if v.reached_at_s is not None or v.past or not v.back:
            mem.off_since = None
            return []  # reached stays reached (until the next episode, or back for hold)
        mem.off_since = mem.off_since if mem.off_since is not None else now
        if now - mem.off_since >= p.hold_s:
            _calm(mem, j, ItemState.HEADING)  # re-armed: the value went back for good
        return []
    if j == ItemState.REACHED:
        late = v.deadline_at_s is not None and (v.reached_at_s or now) > v.deadline_at_s
        _enter(mem, ItemState.REACHED, now)
        ctx.update(
            reached_at_s=v.reached_at_s or now, made=None if v.deadline_at_s is None else not late
        )
        return [Raised(Event.REACHED, name, context=ctx)]
    if mem.state == ItemState.MISSED:
        return []  # the deadline is gone: the next news is the target reached
    if j == ItemState.MISSED:
        _enter(mem, ItemState.MISSED, now)
        return [Raised(Event.MISSED, name, context=ctx)]
    if j in (ItemState.LATE, ItemState.SHORT):
        mem.off_since = None
        if mem.state in (ItemState.LATE, ItemState.SHORT):
            if j == ItemState.SHORT and mem.state == ItemState.LATE:
                mem.state = ItemState.SHORT  # worse news: it will not get there at all
                return [Raised(Event.SHORT, name, context=ctx)]
            if j == ItemState.LATE and mem.state == ItemState.SHORT:
                mem.state = ItemState.LATE  # better, still a warning: no alert
            return []
        if held:
            mem.pending_since = None
            _calm(mem, j, ItemState.HEADING)
            return []
        if not _delay_over(mem, p, now):
            pending = mem.pending_since
            _calm(mem, j, ItemState.HEADING)
            mem.pending_since = pending
            return []
        _enter(mem, j, now)
        return [Raised(Event(j), name, context=ctx)]
    # calm judgement
    if mem.state in (ItemState.LATE, ItemState.SHORT):
        if j == ItemState.LEARNING or not v.eased:
            mem.off_since = None
            return []  # no fit is no news, and on course by a hair is not yet: hold it
        mem.off_since = mem.off_since if mem.off_since is not None else now
        if now - mem.off_since >= p.hold_s:
            was = mem.state
            _calm(mem, j, ItemState.HEADING)
            return [Raised(Event.RECOVERED, name, context={**ctx, "from_state": was})]
        return []
    _calm(mem, j, ItemState.HEADING)
    return []


def _budget(mem: LevelMemory, v: LevelView, doc: dict[str, Any]) -> list[Raised]:
    b = doc.get("budget")
    if not isinstance(b, dict):
        return []
    now_state = BudgetState(b.get("state", BudgetState.OK))
    was, mem.budget = mem.budget, now_state
    if now_state == was or now_state == BudgetState.OK:
        return []
    if now_state == BudgetState.RUNNING_OUT and was == BudgetState.USED_UP:
        return []
    return [Raised(Event(now_state), v.name, context={"budget": b})]


def _regime(
    st: ItemAlertState, fc: dict[str, Any], p: RuleParams, now: float, held: bool = False
) -> list[Raised]:
    # The fit notes a change of the surroundings and starts its window there; the estimate of
    # that moment wanders as readings arrive, so only a start later than the last one alerted on
    # by more than REGIME_GAP_S (or the hold time) counts as new.  A change inside a defrost
    # hold is taken note of without an alert (the defrost is the change).  With an alarm delay,
    # a change waits until an incident is open (a warning raised, past its delay): a door opened
    # for a minute and shut again, which puts nothing at stake, is never told.
    notes = fc.get("notes") or []
    if not any(n.get("code") in REGIME_CODES for n in notes):
        return []
    start = epoch(fc.get("regime_start"))
    if start is None:
        return []
    if st.regime_start is not None and start <= st.regime_start + max(p.hold_s, REGIME_GAP_S):
        return []
    if held:
        st.regime_start = start
        return []
    if p.delay_s > 0 and not st.incident_open:
        return []  # nothing at stake (yet): judged again at the next refit
    st.regime_start = start
    return [Raised(Event.REGIME, context={"regime_start": start})]
