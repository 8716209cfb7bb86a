"""An alert as data (the JSON every hook gets) and in words: a headline, one plain sentence,
the technical figures, and the site's own "what to do" line.

    headline    reefer-07 (north-yard): may cross 8.0 °C in about 42 min
    sentence    reefer-07 may cross its limit of 8.0 °C at about 14:05 CET, in 42 min (90 %:
                13:50 to 14:31 CET, in 27 min to 1 h 08 min); 6.4 °C now.
    details     given ambient 27.0 °C, time constant 9 h 58 min
    what_to_do  check the unit's power; move the load if it is not back within 20 min

Clock times are in the site's zone (the config's ``timezone``, else the machine's), with the
date when it is not the alert's day; durations count from the alert's time, in the one format of
``daemon/timefmt.py``.  The words of the events are those of ``daemon/states.py``.
"""

from __future__ import annotations

import re
from typing import Any

from thermeta.daemon.alerts.rules import ItemAlertState, Raised, RuleParams, remaining_s
from thermeta.daemon.levels.judge import epoch
from thermeta.daemon.states import Event, ItemState
from thermeta.daemon.timefmt import clock as _clock
from thermeta.daemon.timefmt import clock_span, duration, span
from thermeta.daemon.units import UNIT_SIGN
from thermeta.predictors.result import rfc3339

CAUTION = (
    "Forecasts support decisions; local codes and the site's own procedures decide "
    "limits and actions."
)
DEFAULT_NAME = re.compile(r"^(limit|target)(-\d+)?$")  # a level's name when none was given
# The whole caution, where there is room for it (the record, the README, the mail).
CAUTION_FULL = (
    "Forecasts support decisions; they are not a food-safety plan or a regulatory record. "
    "Local codes and licensed practice decide the limits and the actions."
)


def clock(epoch_s: float | None, now_s: float | None = None) -> str:
    """'14:05 CET' in the site's zone; with the date when it is not the day of ``now_s``."""
    return _clock(epoch_s, now_s)


def temp(v: float | None, unit: str) -> str:
    if v is None:
        return "unknown"
    return f"{v:.1f} {UNIT_SIGN.get(unit, unit)}"


def eta_clause(a: dict[str, Any], verb: str = "cross") -> str:
    """'forecast to cross at 14:05 CET, in 42 min (90 %: 13:50 to 14:31 CET, in 27 min to
    1 h 08 min)' or why there is none."""
    if a.get("eta_s") is None:
        return "no crossing forecast" if verb == "cross" else "not forecast to get there"
    if a["eta_s"] == 0:
        return "the fitted curve is already past the threshold"
    now = a.get("at_s")
    text = f"forecast to {verb} at {clock(a['crossing_at_s'], now)}, in {duration(a['eta_s'])}"
    lo, hi = a.get("eta_lo_s"), a.get("eta_hi_s")
    if lo is None:
        return text
    if hi is not None and span(lo, hi) == duration(lo):
        return text + ", give or take a minute"
    when = clock_span(a.get("crossing_lo_at_s"), a.get("crossing_hi_at_s"), now)
    if hi is None:
        return (
            text
            + f" (90 %: not before {clock(a.get('crossing_lo_at_s'), now)}, in "
            + (f"{duration(lo)}; no later bound)")
        )
    return text + f" (90 %: {when}, in {span(lo, hi)})"


def fit_clause(a: dict[str, Any]) -> str:
    """The technical figures behind a forecast: where the item is heading and how fast; only
    what is known ('' when nothing is)."""
    amb = temp(a.get("ambient"), a["unit"]) if a.get("ambient") is not None else None
    tau = a.get("time_constant_s")
    # the ambient's source: the item's config, its air probe (whose fitted level is where the
    # air is heading, not a reading), or the fit
    mode = a.get("ambient_mode")
    where = None
    if mode == "measured":
        where = f"air probe heading for {amb}" if amb else "ambient from the air probe"
    elif mode == "known" and a.get("ambient_given") is not None:
        # the item's own value, never the fit's; and said plainly when the readings disagree
        given = temp(a["ambient_given"], a["unit"])
        where = (
            f"the readings disagree with the given ambient {given} (they point to {amb})"
            if a.get("ambient_contradicted") and amb
            else f"given ambient {given}"
        )
    elif amb:
        where = f"{'given' if mode == 'known' else 'fitted'} ambient {amb}"
    parts = [where] if where else []
    if tau and tau >= 1.0:
        parts.append(f"time constant {duration(tau)}")
    return ", ".join(parts)


def what(a: dict[str, Any]) -> str:
    """The level in words: 'its limit of 8.0 °C', 'stage 1 (21.0 °C by 14:05 CET)',
    "its target 'pitch' of 20.0 °C"."""
    thr = temp(a.get("threshold"), a["unit"])
    deadline = a.get("deadline_at_s")
    by = f" by {clock(deadline, a.get('at_s'))}" if deadline is not None else ""
    if a.get("stage"):
        return f"stage {a['stage']} ({thr}{by})"
    kind = a.get("kind") or "limit"
    name = a.get("level") or ""
    named = "" if not name or DEFAULT_NAME.match(name) else f" '{name}'"
    return f"its {kind}{named} of {thr}{by}"


def _now(a: dict[str, Any]) -> str:
    return f"{temp(a.get('value_now'), a['unit'])} now"


def _chance(a: dict[str, Any]) -> str:
    c = a.get("chance")
    return "" if c is None else f", chance of making it {100 * c:.0f} %"


def _doubt(a: dict[str, Any]) -> str:
    """A doubt the reader must see beside the numbers, not only in the details."""
    if a.get("ambient_mode") == "known" and a.get("ambient_contradicted"):
        return " The readings disagree with the given ambient: treat the time with care."
    return ""


def sentence(a: dict[str, Any]) -> str:
    """The alert in one plain sentence: what, when, how sure, and the value now."""
    return _sentence(a) + _doubt(a)


def _sentence(a: dict[str, Any]) -> str:
    item, event, unit = a["item"], a["event"], a["unit"]
    lv = what(a)
    at = a.get("at_s")
    if event == Event.APPROACHING:
        return f"{item} is approaching {lv}: {_now(a)}, {eta_clause(a)}."
    if event == Event.CROSSED:
        since = a.get("crossed_at_s")
        ago = (
            f" since {clock(since, at)} ({duration(a['at_s'] - since)} ago)"
            if since and a.get("reminder")
            else ""
        )
        went = {"above": "risen above", "below": "fallen below"}.get(a.get("side") or "", "crossed")
        head = (
            f"Reminder: {item} is still past {lv}"
            if a.get("reminder")
            else f"{item} has {went} {lv}"
        )
        return f"{head}{ago}: {_now(a)}."
    if event == Event.RECOVERED:
        was = a.get("from_state")
        if was == ItemState.APPROACHING:
            return (
                f"{item} is no longer expected to cross {lv} within "
                f"{duration(a['lead_s'])}: {_now(a)}, {eta_clause(a)}."
            )
        if was in (ItemState.LATE, ItemState.SHORT):
            return (
                f"{item} is back on course for {lv}: {eta_clause(a, 'get there')}{_chance(a)}; "
                f"{_now(a)}."
            )
        band = f"{a['hysteresis']:g} {UNIT_SIGN.get(unit, unit)}"
        how = (
            f"by more than the {band} band"
            if a.get("by") == "band"
            else f"for {duration(a['hold_s'])}"
        )
        where = {"above": "below", "below": "above"}.get(a.get("side") or "", "back across")
        return f"{item} is back {where} {lv} {how}: {_now(a)}."
    if event == Event.LATE:
        return f"{item} may be late for {lv}: {eta_clause(a, 'get there')}{_chance(a)}; {_now(a)}."
    if event == Event.SHORT:
        return (
            f"{item} is not forecast to reach {lv}: the fitted curve levels off short of it; "
            f"{_now(a)}."
        )
    if event == Event.MISSED:
        return f"{item} missed {lv}: {_now(a)}, {eta_clause(a, 'get there')}."
    if event == Event.REACHED:
        got = a.get("reached_at_s")
        deadline = a.get("deadline_at_s")
        verb = "made" if a.get("stage") and a.get("made") else "reached"
        text = f"{item} {verb} {lv} at {clock(got, at)}"
        if deadline is not None and got is not None:
            gap = duration(abs(deadline - got))
            text += (
                f", {gap} before its deadline" if got <= deadline else f", {gap} after its deadline"
            )
        return text + f": {_now(a)}."
    if event in (Event.RUNNING_OUT, Event.USED_UP):
        b = a.get("budget") or {}
        over = "in this episode" if b.get("over") == "episode" else "in the rolling period"
        used, allowed = duration(b.get("used_s")), duration(b.get("allowed_s"))
        beyond = f"{'above' if a.get('side') == 'above' else 'below'} {temp(a['threshold'], unit)}"
        if event == Event.USED_UP:
            return (
                f"{item}'s allowance {beyond} is used up: {used} {over} (allowed {allowed}); "
                f"{_now(a)}."
            )
        out = epoch(b.get("runs_out_at"))
        when = (
            f"at the present course it is used up at {clock(out, at)} (in "
            f"{duration(out - a['at_s'])})"
            if out is not None
            else "it is being used"
        )
        return (
            f"{item}'s allowance {beyond} is running out: {used} of {allowed} used {over}; "
            f"{when}; {_now(a)}."
        )
    if event == Event.STALE:
        last = a.get("last_reading_at_s")
        quiet = duration(a["at_s"] - last) if last else "a while"
        text = (
            f"{item} has sent no reading for {quiet} (silence limit "
            f"{duration(a['silence_s'])}): last value {temp(a.get('value_now'), unit)} "
            f"at {clock(last, at)}"
        )
        due = a.get("crossing_at_s")
        if a.get("kind", "limit") == "limit" and due is not None and due <= a["at_s"] + 60:
            # the forecast crossing time has come while the readings were away
            return (
                text + f"; the readings stopped while it was about to cross {lv} (forecast "
                "for about now): check it on site."
            )
        return text + f"; {lv}."
    if event == Event.RESUMED:
        return f"{item} is reporting again: {_now(a)}, {eta_clause(a)}."
    if event == Event.REGIME:
        return (
            f"{item}'s surroundings changed at {clock(a.get('regime_start_s'), at)} (door, power "
            f"or coolant?): the fit now starts there; {_now(a)}, {eta_clause(a)}."
        )
    raise ValueError(f"unknown alert event {event!r}")


def headline(a: dict[str, Any]) -> str:
    """The alert in a few words, as a mail's subject or a pager's line:
    'reefer-07 (north-yard): may cross 8.0 °C in about 42 min'."""
    site = a.get("site")
    named = site and not a["item"].startswith(f"{site}/")  # not when the name says it already
    item = a["item"] + (f" ({site})" if named else "")
    event, unit = a["event"], a["unit"]
    thr = temp(a.get("threshold"), unit)
    at = a.get("at_s")
    eta = a.get("eta_s")
    deadline = a.get("deadline_at_s")
    by = f" by {clock(deadline, at)}" if deadline is not None else ""
    if event == Event.APPROACHING:
        text = f"may cross {thr} in about {duration(eta)}" if eta else f"nearing {thr}"
    elif event == Event.CROSSED:
        way = {"above": "above", "below": "below"}.get(a.get("side") or "", "past")
        text = f"{'still ' if a.get('reminder') else ''}{way} {thr}, {_now(a)}"
    elif event == Event.RECOVERED:
        text = f"back within {thr}" if a.get("kind") != "target" else f"back on course for {thr}"
        if a.get("from_state") == ItemState.APPROACHING:
            text = f"no longer nearing {thr}"
    elif event == Event.LATE:
        text = f"may miss {thr}{by}"
    elif event == Event.SHORT:
        text = f"will not reach {thr}"
    elif event == Event.MISSED:
        text = f"missed {thr}{by}"
    elif event == Event.REACHED:
        text = f"reached {thr} at {clock(a.get('reached_at_s'), at)}"
    elif event in (Event.RUNNING_OUT, Event.USED_UP):
        side = "above" if a.get("side") == "above" else "below"
        out = epoch((a.get("budget") or {}).get("runs_out_at"))
        text = f"allowance {side} {thr} " + (
            "used up"
            if event == Event.USED_UP
            else (f"runs out in about {duration(out - at)}" if out and at else "running out")
        )
    elif event == Event.STALE:
        last = a.get("last_reading_at_s")
        text = f"no readings for {duration(at - last)}" if last and at else "no readings"
    elif event == Event.RESUMED:
        text = f"reporting again, {_now(a)}"
    elif event == Event.REGIME:
        text = f"surroundings changed at {clock(a.get('regime_start_s'), at)}"
    else:
        raise ValueError(f"unknown alert event {event!r}")
    return f"{item}: {text}"


def todo_for(what_to_do: str | dict[str, str] | None, event: str) -> str | None:
    """The configured 'what to do' line for ``event``: one line for every warning (not for
    good news), or the table's line for the event."""
    if what_to_do is None:
        return None
    if isinstance(what_to_do, str):
        return what_to_do if event not in (Event.REACHED, Event.RECOVERED, Event.RESUMED) else None
    return what_to_do.get(str(event))


def _level_doc(fc: dict[str, Any], name: str | None) -> dict[str, Any]:
    """The level the alert is about (its JSON in the forecast), else the item's focus."""
    docs = fc.get("levels") or []
    want = name or fc.get("focus")
    for d in docs:
        if d.get("name") == want:
            return d
    return docs[0] if docs else {}


def build_alert(
    item: str,
    fc: dict[str, Any],
    ev: Raised,
    st: ItemAlertState,
    p: RuleParams,
    now: float,
    *,
    unit: str = "C",
    silence_s: float | None = None,
    site: str | None = None,
    what_to_do: str | dict[str, str] | None = None,
) -> dict[str, Any]:
    """The alert's JSON body (numbers in the item's unit, times as RFC 3339 and epoch s)."""
    st.seq += 1
    lv = _level_doc(fc, ev.level)
    src = lv if lv else fc
    if lv:
        eta, lo, hi = lv.get("eta_s"), lv.get("eta_lo_s"), lv.get("eta_hi_s")  # from now
    else:
        eta, lo, hi = (remaining_s(fc, k, now) for k in ("eta_s", "eta_lo_s", "eta_hi_s"))
    last = fc.get("last_reading_at")
    mem = st.levels.get(str(lv.get("name"))) if lv else None
    a: dict[str, Any] = {
        "id": f"{item}:{st.incident}:{ev.event}:{st.seq}",
        "item": item,
        "event": ev.event,
        "level": lv.get("name"),
        "kind": lv.get("kind", "limit"),
        "stage": lv.get("stage"),
        "reminder": ev.reminder,
        "incident": st.incident,
        "at": rfc3339(now),
        "at_s": now,
        "state": fc.get("state"),
        "level_state": lv.get("state"),
        "value_now": fc.get("value_now"),
        "threshold": src.get("threshold", p.threshold),
        "unit": unit,
        "direction": fc.get("direction"),
        "side": lv.get("side"),
        "eta_s": eta,
        "eta_lo_s": lo,
        "eta_hi_s": hi,
        "crossing_at_s": None if eta is None else now + eta,
        "crossing_lo_at_s": None if lo is None else now + lo,
        "crossing_hi_at_s": None if hi is None else now + hi,
        "deadline_at_s": lv.get("deadline_at_s"),
        "chance": lv.get("chance"),
        "reached_at_s": lv.get("reached_at_s"),
        "budget": lv.get("budget"),
        "episode": (fc.get("episode") or {}).get("id"),
        "ambient": fc.get("ambient"),
        "ambient_mode": fc.get("ambient_mode"),
        "ambient_given": fc.get("ambient_given"),
        "ambient_contradicted": bool(fc.get("ambient_contradicted")),
        "time_constant_s": fc.get("time_constant_s"),
        "k_per_s": fc.get("k_per_s"),
        "last_reading_at_s": epoch(last),
        "lead_s": lv.get("lead_s", p.lead_s),
        "hysteresis": p.hysteresis,
        "hold_s": p.hold_s,
        "silence_s": silence_s,
        "crossed_at_s": None if mem is None else mem.crossed_at,
    }
    if site:
        a["site"] = site
    a.update(ev.context)
    if "regime_start" in ev.context:
        a["regime_start_s"] = ev.context["regime_start"]
        a["regime_start"] = rfc3339(ev.context["regime_start"])
    for k in (
        "crossing_at",
        "crossing_lo_at",
        "crossing_hi_at",
        "crossed_at",
        "last_reading_at",
        "deadline_at",
        "reached_at",
    ):
        a[k] = rfc3339(a.get(k + "_s"))
    a["headline"] = headline(a)
    a["sentence"] = sentence(a)
    a["details"] = fit_clause(a) or None
    a["what_to_do"] = todo_for(what_to_do, ev.event)
    a["caution"] = CAUTION
    return a
