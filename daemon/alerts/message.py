"""An alert as data (the JSON every hook gets) and as one plain sentence with the numbers.

    trailer-4 is approaching its threshold: -16.4 °C now against a threshold of -15.0 °C,
    forecast to cross at 14:05 UTC (in 42 min; 90 % interval 13:50 UTC to 14:31 UTC, in 27 min
    to 68 min); fitted ambient 12.0 °C, time constant 9 h 58 min.

Clock times are the host's local zone with its name, durations counted from the alert's time.
"""

from __future__ import annotations

import math
from datetime import UTC, datetime
from typing import Any

from thermeta.daemon.alerts.rules import Event, ItemAlertState, RuleParams, _t, remaining_s
from thermeta.daemon.states import AlertLevel, EpisodeLevel
from thermeta.daemon.timefmt import human_duration
from thermeta.daemon.units import UNIT_SIGN
from thermeta.predictors.result import rfc3339

CAUTION = (
    "Forecasts support decisions; local codes and the site's own procedures decide "
    "limits and actions."
)


def clock(epoch_s: float | None) -> str:
    """'14:05 UTC' in the host's zone; with the date when it is not today."""
    if epoch_s is None or not math.isfinite(epoch_s):
        return "-"
    dt = datetime.fromtimestamp(epoch_s, tz=UTC).astimezone()
    today = datetime.now(UTC).astimezone().date()
    return dt.strftime("%H:%M %Z" if dt.date() == today else "%Y-%m-%d %H:%M %Z")


def temp(v: float | None, unit: str) -> str:
    if v is None:
        return "unknown"
    return f"{v:.1f} {UNIT_SIGN.get(unit, unit)}"


def eta_clause(a: dict[str, Any]) -> str:
    """'forecast to cross at 14:05 UTC (in 42 min; 90 % interval ...)' or why there is none."""
    if a.get("eta_s") is None:
        return "no crossing forecast"
    if a["eta_s"] == 0:
        return "the fitted curve is already past the threshold"
    text = f"forecast to cross at {clock(a['crossing_at_s'])} (in {human_duration(a['eta_s'])}"
    lo, hi = a.get("eta_lo_s"), a.get("eta_hi_s")
    if lo is not None and hi is not None and hi - lo < 60:
        return text + "; 90 % interval under a minute wide)"
    if lo is not None:
        hi_clock = clock(a["crossing_hi_at_s"]) if hi is not None else "no later bound"
        hi_in = human_duration(hi) if hi is not None else "open-ended"
        text += (
            f"; 90 % interval {clock(a['crossing_lo_at_s'])} to {hi_clock}, "
            f"in {human_duration(lo)} to {hi_in}"
        )
    return text + ")"


def fit_clause(a: dict[str, Any]) -> str:
    amb = temp(a.get("ambient"), a["unit"]) if a.get("ambient") is not None else "not known"
    tau = human_duration(a.get("time_constant_s")) if a.get("time_constant_s") else "not known"
    # the ambient's source: the item's config, its air probe (whose fitted level is where the
    # air is heading, not a reading), or the fit
    mode = a.get("ambient_mode")
    if mode == "measured":
        where = (
            f"air probe heading for {amb}"
            if a.get("ambient") is not None
            else "ambient from the air probe"
        )
    elif mode == "known" and a.get("ambient_given") is not None:
        # the item's own value, never the fit's; and said plainly when the readings disagree
        given = temp(a["ambient_given"], a["unit"])
        where = (
            f"the readings disagree with the given ambient {given} (they point to {amb})"
            if a.get("ambient_contradicted")
            else f"given ambient {given}"
        )
    else:
        where = f"{'given' if mode == 'known' else 'fitted'} ambient {amb}"
    return f"{where}, time constant {tau}"


def sentence(a: dict[str, Any]) -> str:
    item, level, unit = a["item"], a["level"], a["unit"]
    now_thr = (
        f"{temp(a.get('value_now'), unit)} now against a threshold of {temp(a['threshold'], unit)}"
    )
    if level == AlertLevel.APPROACHING:
        return f"{item} is approaching its threshold: {now_thr}, {eta_clause(a)}; {fit_clause(a)}."
    if level == AlertLevel.CROSSED:
        since = a.get("crossed_at_s")
        ago = (
            f" since {clock(since)} ({human_duration(a['at_s'] - since)} ago)"
            if since and a.get("reminder")
            else ""
        )
        # a cooling batch reaching its pitching or holding temperature has "fallen below" it
        went = {"upper": "risen above", "lower": "fallen below"}.get(a.get("side") or "", "crossed")
        head = (
            f"Reminder: {item} is still past its threshold"
            if a.get("reminder")
            else f"{item} has {went} its threshold"
        )
        return f"{head}{ago}: {now_thr}; {fit_clause(a)}."
    if level == AlertLevel.RECOVERED:
        if a.get("from_level") == EpisodeLevel.APPROACHING:
            return (
                f"{item} is no longer expected to cross within {human_duration(a['lead_s'])}: "
                f"{now_thr}, {eta_clause(a)}; {fit_clause(a)}."
            )
        band = f"{a['hysteresis']:g} {UNIT_SIGN.get(unit, unit)}"
        how = (
            f"by more than the {band} band"
            if a.get("by") == "band"
            else f"for {human_duration(a['hold_s'])}"
        )
        where = {"upper": "below", "lower": "above"}.get(a.get("side") or "", "back across")
        return f"{item} is back {where} its threshold {how}: {now_thr}; {fit_clause(a)}."
    if level == AlertLevel.STALE:
        last = a.get("last_reading_at_s")
        quiet = human_duration(a["at_s"] - last) if last else "a while"
        return (
            f"{item} has sent no reading for {quiet} (silence limit "
            f"{human_duration(a['silence_s'])}): last value {temp(a.get('value_now'), unit)} "
            f"at {clock(last)}, threshold {temp(a['threshold'], unit)}."
        )
    if level == AlertLevel.RESUMED:
        return f"{item} is reporting again: {now_thr}, {eta_clause(a)}."
    if level == AlertLevel.REGIME:
        return (
            f"{item}'s surroundings changed at {clock(a.get('regime_start_s'))} (door, power or "
            f"coolant?): the fit now starts there, {fit_clause(a)}; {now_thr}, {eta_clause(a)}."
        )
    raise ValueError(f"unknown alert level {level!r}")


def build_alert(
    item: str,
    fc: dict[str, Any],
    ev: Event,
    st: ItemAlertState,
    p: RuleParams,
    now: float,
    *,
    unit: str = "C",
    silence_s: float | None = None,
    site: str | None = None,
) -> dict[str, Any]:
    """The alert's JSON body (numbers in the item's unit, times as RFC 3339 and epoch s)."""
    st.seq += 1
    eta = remaining_s(fc, "eta_s", now)
    lo = remaining_s(fc, "eta_lo_s", now)
    hi = remaining_s(fc, "eta_hi_s", now)
    last = fc.get("last_reading_at")
    a: dict[str, Any] = {
        "id": f"{item}:{st.episode}:{ev.level}:{st.seq}",
        "item": item,
        "level": ev.level,
        "reminder": ev.reminder,
        "episode": st.episode,
        "at": rfc3339(now),
        "at_s": now,
        "state": fc.get("state"),
        "value_now": fc.get("value_now"),
        "threshold": p.threshold,
        "unit": unit,
        "direction": fc.get("direction"),
        "side": st.side,
        "eta_s": eta,
        "eta_lo_s": lo,
        "eta_hi_s": hi,
        "crossing_at_s": None if eta is None else now + eta,
        "crossing_lo_at_s": None if lo is None else now + lo,
        "crossing_hi_at_s": None if hi is None else now + hi,
        "ambient": fc.get("ambient"),
        "ambient_mode": fc.get("ambient_mode"),
        "ambient_given": fc.get("ambient_given"),
        "ambient_contradicted": bool(fc.get("ambient_contradicted")),
        "time_constant_s": fc.get("time_constant_s"),
        "k_per_s": fc.get("k_per_s"),
        "last_reading_at_s": _t(last),
        "lead_s": p.lead_s,
        "hysteresis": p.hysteresis,
        "hold_s": p.hold_s,
        "silence_s": silence_s,
        "crossed_at_s": st.crossed_at,
    }
    if site:
        a["site"] = site
    a.update(ev.context)
    if "regime_start" in ev.context:
        a["regime_start_s"] = ev.context["regime_start"]
        a["regime_start"] = rfc3339(ev.context["regime_start"])
    for k in ("crossing_at", "crossing_lo_at", "crossing_hi_at", "crossed_at", "last_reading_at"):
        a[k] = rfc3339(a.get(k + "_s"))
    a["sentence"] = sentence(a)
    a["caution"] = CAUTION
    return a
