"""How a dashboard row looks and reads: its look by the time left (and the board's order), its
state symbol, and the words for its temperatures, times left, deadlines and allowances.

Pure text, no drawing: ``dashboard.py`` lays these out with rich (and re-exports those it uses).
"""

from __future__ import annotations

import math
from enum import IntEnum

from thermeta.daemon.alerts.message import UNIT_SIGN
from thermeta.daemon.states import ATTENTION, ItemState
from thermeta.daemon.timefmt import duration, local, local_clock, span
from thermeta.daemon.views.board import Board, LevelLine, Row

# each state's symbol: its shape says the same as its word
SYMBOL: dict[str, str] = {
    ItemState.CROSSED: "✖",
    ItemState.MISSED: "✖",
    ItemState.APPROACHING: "▲",
    ItemState.LATE: "▲",
    ItemState.SHORT: "▼",
    ItemState.STALE: "?",
    ItemState.LEARNING: "…",
    ItemState.WAITING: "○",
    ItemState.HEADING: "●",
    ItemState.STEADY: "●",
    ItemState.REACHED: "✔",
}


class Look(IntEnum):
    """How much a row asks of the operator now, by the time left (the board's order)."""

    PAST = 0  # a limit crossed, a target missed, an allowance used up
    SOON = 1  # the early end of the interval (or the deadline's risk) inside lead
    NO_DATA = 2  # nothing to judge by: stale, learning, waiting
    CALM = 3  # plenty of time, or good news


ACCENT = "magenta"  # the one colour: readable on light and dark terminals
STYLE = {
    Look.PAST: "reverse bold",
    Look.SOON: f"bold {ACCENT}",
    Look.NO_DATA: "dim",
    Look.CALM: "",
}
PAST_STATES = (ItemState.CROSSED, ItemState.MISSED)
SOON_STATES = (ItemState.APPROACHING, ItemState.LATE, ItemState.SHORT)
NO_DATA_STATES = (ItemState.STALE, ItemState.LEARNING, ItemState.WAITING)


def look(r: Row | LevelLine, lead_s: float | None = None) -> Look:
    """The row's look from its time left (its state is decided by the same tests)."""
    if r.state in PAST_STATES or getattr(r, "budget_state", None) == "used_up":
        return Look.PAST
    if r.state in SOON_STATES or getattr(r, "budget_state", None) == "running_out":
        return Look.SOON
    if r.state in NO_DATA_STATES:
        return Look.NO_DATA
    lead = lead_s if lead_s is not None else getattr(r, "lead_s", None)
    early = r.eta_lo_s if r.eta_s is not None else None
    near = early is not None and lead is not None and early <= lead
    if near and r.kind == "limit" and r.state == ItemState.STEADY:
        return Look.SOON  # a crossing past the horizon whose early end is near
    return Look.CALM


SPARK = "▁▂▃▄▅▆▇█"
NARROW_DUE = 24  # a narrow screen's one time column
NOTE_ROOM = 27  # a wide screen's interval column, where a level's deadline or allowance goes


def sparkline(values: list[float], threshold: float | None, width: int) -> str:
    """Block characters for the bucket means, resampled to ``width`` cells (blank: no reading)."""
    vals = values
    if width < len(values):
        n = len(values)
        vals = []
        for i in range(width):
            chunk = [v for v in values[i * n // width : (i + 1) * n // width] if math.isfinite(v)]
            vals.append(sum(chunk) / len(chunk) if chunk else math.nan)
    finite = [v for v in vals if math.isfinite(v)]
    if not finite:
        return " " * len(vals)
    lo, hi = min(finite), max(finite)
    if threshold is not None and abs(threshold - hi) < 3 * (hi - lo + 1e-9):
        lo, hi = min(lo, threshold), max(hi, threshold)
    span_ = hi - lo or 1.0
    return "".join(
        " " if not math.isfinite(v) else SPARK[min(7, int((v - lo) / span_ * 7.999))] for v in vals
    )


def due_text(r: Row | LevelLine) -> str:
    """When the level is due, in words: the point forecast, or why there is none."""
    if r.state == ItemState.CROSSED:
        return "past it"
    if r.state == ItemState.MISSED:
        return "missed"
    if r.state == ItemState.REACHED:
        return "reached"
    if r.state == ItemState.WAITING:
        return "not started"
    if getattr(r, "due_passed", False):
        return "was due"
    if r.state == ItemState.SHORT:
        return "never"
    if r.eta_s is None and r.state == ItemState.STEADY and r.eta_lo_s is not None:
        # the best fit never crosses, yet the 90 % interval has an early end: show it
        return span(r.eta_lo_s, r.eta_hi_s)
    if r.eta_s is None:
        return "no crossing" if r.state == ItemState.STEADY else "-"
    return duration(r.eta_s)


def range_text(r: Row | LevelLine) -> str:
    """The 90 % interval of the time left ('35 to 50 min', '4 min or later'), where one is."""
    if due_text(r) != duration(r.eta_s) or r.eta_lo_s is None:
        return ""
    return span(r.eta_lo_s, r.eta_hi_s)


def when_text(r: Row | LevelLine) -> str:
    """The narrow screen's one cell: the interval when there is one, else the point or word."""
    return range_text(r) or due_text(r)


def deadline_clock(at: float, now: float) -> str:
    """A deadline in few characters: '16:30' today, 'Sat 02:11' on another day (the site's zone)."""
    same_day = local(at).date() == local(now).date()
    return local_clock(at) if same_day else local(at).strftime("%a ") + local_clock(at)


def level_note(lv: LevelLine, now: float) -> str:
    """What a level waits for besides its time: its deadline and chance, or its budget."""
    parts = []
    if lv.deadline_s is not None:
        text = f"by {deadline_clock(now + lv.deadline_s, now)}"
        if lv.chance is not None and lv.state not in (ItemState.REACHED, ItemState.MISSED):
            text += f", {100 * lv.chance:.0f} % chance"
        parts.append(text)
    if lv.budget_left_s is not None:
        text = f"allowance {duration(lv.budget_left_s)} left"
        out = f", out in {duration(lv.budget_out_s)}" if lv.budget_out_s is not None else ""
        if lv.budget_left_s > 0 and len(text + out) <= NOTE_ROOM:
            text += out
        parts.append(text)
    return "; ".join(parts)


def narrow_level(lv: LevelLine, now: float) -> str:
    """A level's one cell on a narrow screen: its deadline and chance ('by 16:30, 3 % chance'),
    its allowance ('allowance 32 min left', 'allowance used up'), or its time left."""
    if lv.deadline_s is not None:
        text = f"by {deadline_clock(now + lv.deadline_s, now)}"
        if lv.chance is not None and lv.state not in (ItemState.REACHED, ItemState.MISSED):
            text += f", {100 * lv.chance:.0f} % chance"
        return text if len(text) <= NARROW_DUE else text[: -len(" chance")]
    if lv.budget_left_s is not None:
        if lv.budget_state == "used_up" or lv.budget_left_s <= 0:
            return "allowance used up"
        return f"allowance {duration(lv.budget_left_s)} left"
    return when_text(lv)


def temp(v: float | None, unit: str, fmt: str = "{:.1f}") -> str:
    """A temperature with its unit sign, '-' when unknown."""
    return "-" if v is None else f"{fmt.format(v)} {UNIT_SIGN.get(unit, unit)}"


def level_text(threshold: float | None, unit: str, kind: str) -> str:
    """'8 °C' for a limit, 'to 22 °C' for a target."""
    if threshold is None:
        return "-"
    return ("to " if kind == "target" else "") + temp(threshold, unit, "{:g}")


def _arrow(trend: float | None) -> str:
    if trend is None:
        return ""
    return " ↑" if trend > 0.05 else (" ↓" if trend < -0.05 else " →")


def now_text(r: Row) -> str:
    return "no data" if r.value is None else temp(r.value, r.unit) + _arrow(r.trend_per_h)


def order_key(r: Row) -> tuple:
    soon = r.eta_lo_s if r.eta_lo_s is not None and r.eta_s is not None else r.eta_s
    return (look(r), math.inf if soon is None else soon, r.item)


def visible(board: Board, text_filter: str = "", attention_only: bool = False) -> list[Row]:
    rows = [r for r in board.rows if text_filter.lower() in r.item.lower()]
    if attention_only:
        rows = [r for r in rows if r.state in ATTENTION or r.alert or look(r) <= Look.SOON]
    return sorted(rows, key=order_key)


def rate_text(per_s: float | None) -> str:
    """Readings per second, or per minute on a slow feed (never a bare 0.0)."""
    if per_s is None:
        return "- readings/s"
    if per_s >= 1.0:
        return f"{per_s:.1f} readings/s"
    return f"{per_s * 60:.1f} readings/min"
