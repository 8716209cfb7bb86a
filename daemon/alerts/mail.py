"""An alert as a mail a person reads: the subject is the headline (item, site, event, time left),
the body the sentence, the site's "what to do" line, then the figures, each temperature with its
unit, each duration in hours and minutes, each clock time in the site's zone.

    Subject: reefer-07 (north-yard): may cross 8.0 °C in about 42 min

    reefer-07 is approaching its limit of 8.0 °C: 6.4 °C now, forecast to cross at 14:47 CET, ...

    What to do: check the unit's power; move the load if it is not back within 20 min

         item: reefer-07
         site: north-yard
        value: 6.4 °C now
        level: limit 8.0 °C (crossed once above it) 8.0 °C
          forecast: 14:47 CET, in 42 min
     90 % interval: 14:32 CET or later, in 27 min or later
          ...
"""

from __future__ import annotations

from typing import Any

from thermeta.daemon.alerts.message import CAUTION_FULL, DEFAULT_NAME, headline, temp
from thermeta.daemon.timefmt import clock, clock_span, duration, span


def subject(alert: dict[str, Any]) -> str:
    """The headline; a reminder says so first."""
    text = alert.get("headline") or headline(alert)
    return f"Reminder: {text}" if alert.get("reminder") else text


def _figures(a: dict[str, Any]) -> list[tuple[str, str]]:
    unit, at = a.get("unit", "C"), a.get("at_s")
    rows: list[tuple[str, str]] = []
    rows.append(("item", a["item"]))
    if a.get("site"):
        rows.append(("site", a["site"]))
    rows.append(("event", str(a["event"]) + (" (reminder)" if a.get("reminder") else "")))
    if a.get("value_now") is not None:
        rows.append(("value", f"{temp(a['value_now'], unit)} now"))
    if a.get("threshold") is not None:
        kind = a.get("kind") or "limit"
        side = a.get("side")
        verb = "crossed" if kind == "limit" else "reached"
        where = f" ({verb} once {side} it)" if side else ""
        name = a.get("level") or ""
        named = "" if not name or DEFAULT_NAME.match(name) else f" '{name}'"
        rows.append(("level", f"{kind}{named} {temp(a['threshold'], unit)}{where}"))
    if a.get("crossing_at_s") is not None and a.get("eta_s"):
        rows.append(("forecast", f"{clock(a['crossing_at_s'], at)}, in {duration(a['eta_s'])}"))
        if a.get("eta_lo_s") is not None:
            when = clock_span(a.get("crossing_lo_at_s"), a.get("crossing_hi_at_s"), at)
            rows.append(("90 % interval", f"{when}, in {span(a['eta_lo_s'], a.get('eta_hi_s'))}"))
    if a.get("deadline_at_s") is not None:
        rows.append(("deadline", clock(a["deadline_at_s"], at)))
    if a.get("chance") is not None:
        rows.append(("chance of making it", f"{100 * a['chance']:.0f} %"))
    if a.get("reached_at_s") is not None:
        rows.append(("reached", clock(a["reached_at_s"], at)))
    b = a.get("budget") or {}
    if b.get("allowed_s") is not None:
        rows.append(
            ("allowance", f"{duration(b.get('used_s'))} used of {duration(b['allowed_s'])}")
        )
    if a.get("details"):
        rows.append(("fit", str(a["details"])))
    if a.get("last_reading_at_s") is not None:
        rows.append(("last reading", clock(a["last_reading_at_s"], at)))
    if at is not None:
        rows.append(("alert time", clock(at, None)))
    rows.append(("alert id", str(a.get("id", "-"))))
    return rows


def body_text(alert: dict[str, Any]) -> str:
    """The mail's plain text: sentence, what to do, the figures, the caution."""
    lines = [alert["sentence"], ""]
    if alert.get("what_to_do"):
        lines += [f"What to do: {alert['what_to_do']}", ""]
    rows = _figures(alert)
    width = max(len(k) for k, _ in rows)
    lines += [f"{k:>{width}}: {v}" for k, v in rows]
    lines += ["", CAUTION_FULL, ""]
    return "\n".join(lines)
