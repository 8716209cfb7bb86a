"""The terminal dashboard: every item's forecast at a glance, read from the store.

    collect(store, now)            -> Board (header facts + one Row per item; board.py)
    render(board, width, height)   -> a rich renderable (fresh each frame)
    watch(store, console, ...)     the loop behind ``thermeta watch`` (and ``run --dashboard``)

Items are sorted by urgency (crossed, then the soonest early end of the ETA interval), grouped by
site or first name/topic level when there are many.  Every state is shown as a symbol and a word;
colour only repeats it.  When stdout is not a terminal, plain lines are printed instead.
"""

from __future__ import annotations

import math
import time
from typing import Any, TypedDict

from rich.console import Console, Group, JustifyMethod
from rich.table import Table
from rich.text import Text
from thermeta.daemon.alerts.message import CAUTION, UNIT_SIGN
from thermeta.daemon.states import ATTENTION, ItemState
from thermeta.daemon.timefmt import duration, local_clock
from thermeta.daemon.views.board import RANK, Board, LevelLine, Row, collect

STATE_LOOK: dict[
    str, tuple[str, str]
] = {  # symbol, style (colours of our own; the state's word always carries the meaning)
    ItemState.CROSSED: ("✖", "bold #ff6b6b"),
    ItemState.MISSED: ("✖", "bold #ff6b6b"),
    ItemState.APPROACHING: ("▲", "bold #ffb347"),
    ItemState.LATE: ("▲", "bold #ffb347"),
    ItemState.SHORT: ("▼", "bold #ffb347"),
    ItemState.STALE: ("?", "#a0a0d0"),
    ItemState.LEARNING: ("…", "#9a9a9a"),
    ItemState.WAITING: ("○", "#9a9a9a"),
    ItemState.HEADING: ("●", "#6fcf97"),
    ItemState.STEADY: ("●", "#6fcf97"),
    ItemState.REACHED: ("✔", "#6fcf97"),
}
HOT = (
    ItemState.CROSSED,
    ItemState.MISSED,
    ItemState.APPROACHING,
    ItemState.LATE,
    ItemState.SHORT,
)


class ViewState(TypedDict):
    """What the keys have chosen to show."""

    filter: str  # only items whose name holds this
    attention: bool  # only items that need attention
    typing: bool  # the filter is being typed


SPARK = "▁▂▃▄▅▆▇█"
GROUP_WHEN_MORE_THAN = 10


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
    span = hi - lo or 1.0
    return "".join(
        " " if not math.isfinite(v) else SPARK[min(7, int((v - lo) / span * 7.999))] for v in vals
    )


def short_duration(s: float | None) -> str:
    """Compact countdown: 45s, 42m, 3h05, 2d4h; '∞' for unbounded."""
    if s is None or not math.isfinite(s):
        return "∞"
    s = max(0.0, s)
    if s < 90:
        return f"{s:.0f}s"
    if s < 5400:
        return f"{s / 60:.0f}m"
    h, m = divmod(int(round(s / 60)), 60)
    if h < 48:
        return f"{h}h{m:02d}"
    d, h = divmod(h, 24)
    return f"{d}d{h}h"


def eta_text(r: Row | LevelLine) -> str:
    if r.state == ItemState.CROSSED:
        return "past limit"
    if r.state in (ItemState.REACHED, ItemState.MISSED, ItemState.WAITING):
        return str(r.state)
    if r.eta_s is None:
        return "none" if r.state in (ItemState.STEADY, ItemState.SHORT) else "-"
    text = short_duration(r.eta_s)
    if r.eta_lo_s is not None or r.eta_hi_s is not None:
        text += f" [{short_duration(r.eta_lo_s)}-{short_duration(r.eta_hi_s)}]"
    return text


def level_note(lv: LevelLine, now: float) -> str:
    """What a level waits for besides its ETA: its deadline and chance, or its budget."""
    parts = []
    if lv.deadline_s is not None:
        parts.append(f"by {local_clock(now + lv.deadline_s)}")
        if lv.chance is not None and lv.state not in (ItemState.REACHED, ItemState.MISSED):
            parts.append(f"{100 * lv.chance:.0f} %")
    if lv.budget_left_s is not None:
        text = f"budget {short_duration(lv.budget_left_s)} left"
        if lv.budget_out_s is not None and lv.budget_left_s > 0:
            text += f", out in {short_duration(lv.budget_out_s)}"
        parts.append(text)
    return " ".join(parts)


def narrow_level(lv: LevelLine, now: float) -> tuple[str, str]:
    """A level's ETA cell and note on a narrow screen: "2h20 by 19:33" and "3 %", or the ETA
    and "32m left" of a budget."""
    eta = eta_text(lv)
    if lv.deadline_s is not None:
        when = eta if lv.state in (ItemState.REACHED, ItemState.MISSED) else eta.split(" [")[0]
        eta = f"{when} by {local_clock(now + lv.deadline_s)}"
    note = ""
    if lv.chance is not None and lv.state not in (ItemState.REACHED, ItemState.MISSED):
        note = f"{100 * lv.chance:.0f} %"
    elif lv.budget_left_s is not None:
        note = f"{short_duration(lv.budget_left_s)} left"
    return eta, note


def _num(v: float | None, fmt: str = "{:.1f}") -> str:
    return "-" if v is None else fmt.format(v)


def _arrow(trend: float | None) -> str:
    if trend is None:
        return "·"
    return "↑" if trend > 0.05 else ("↓" if trend < -0.05 else "→")


def visible(board: Board, text_filter: str = "", attention_only: bool = False) -> list[Row]:
    rows = [r for r in board.rows if text_filter.lower() in r.item.lower()]
    if attention_only:
        rows = [r for r in rows if r.state in ATTENTION or r.alert]
    return sorted(rows, key=lambda r: r.urgency)


def header_text(board: Board) -> Text:
    t = Text()
    if not board.running:
        ago = (
            f", last heartbeat {duration(board.now - board.heartbeat_at)} ago"
            if board.heartbeat_at
            else ""
        )
        t.append(f"✖ daemon not running{ago}", style="bold #ff6b6b")
    else:
        up = "connected" if board.connected else "DISCONNECTED"
        t.append(
            f"{'●' if board.connected else '✖'} {board.broker} {up}",
            style="#6fcf97" if board.connected else "bold #ff6b6b",
        )
    rate = "-" if board.readings_per_s is None else f"{board.readings_per_s:.1f}"
    refit = (
        "never"
        if board.last_refit_at is None
        else f"{short_duration(board.now - board.last_refit_at)} ago"
    )
    dead = "-" if board.dead_letters is None else board.dead_letters
    t.append(f" · {rate} readings/s · {dead} dead letters · refit {refit}")
    if board.alerts_waiting:
        t.append(f" · {board.alerts_waiting} alerts waiting for hooks", style="bold #ffb347")
    return t


def column_widths(width: int) -> dict[str, int]:
    """Fixed widths, the same for every group's table so the columns line up; the item name and,
    on a wide screen, the sparkline take what is left."""
    if width >= 110:
        w = {"state": 15, "now": 9, "limit": 7, "eta": 20, "amb": 6, "tau": 6}
        rest = width - sum(w.values()) - 7
        w["item"] = min(40, max(16, rest - 24))
        w["spark"] = max(8, min(48, rest - w["item"]))
    else:
        w = {"state": 13, "now": 7, "limit": 6, "eta": 16, "amb": 4, "tau": 5, "spark": 8}
        w["item"] = max(8, width - sum(w.values()) - 7)
    return w


def fit_name(name: str, width: int) -> str:
    """The name, or its end (the most telling part of a long topic-like name) with a leading '…'."""
    return name if len(name) <= width else "…" + name[-(width - 1) :]


def _table(w: dict[str, int], show_header: bool) -> Table:
    table = Table(
        box=None,
        padding=(0, 1, 0, 0),
        pad_edge=False,
        expand=False,
        show_edge=False,
        header_style="bold",
        show_header=show_header,
    )
    columns: tuple[tuple[str, str, JustifyMethod], ...] = (
        ("state", "state", "left"),
        ("item", "item", "left"),
        ("now", "now", "right"),
        ("limit", "limit", "right"),
        ("eta", "ETA [90 %]", "left"),
        ("amb", "amb", "right"),
        ("tau", "tau", "right"),
        ("spark", "last 3h", "left"),
    )
    for key, title, justify in columns:
        table.add_column(title, width=w[key], justify=justify, no_wrap=True, overflow="crop")
    return table


def render(
    board: Board,
    width: int = 80,
    height: int = 24,
    *,
    text_filter: str = "",
    attention_only: bool = False,
    typing: bool = False,
) -> Group:
    """One frame: header, the items (grouped when many), key help and the caution line."""
    rows = visible(board, text_filter, attention_only)
    wide = width >= 110
    w = column_widths(width)
    room = max(1, height - 6 - (1 if width < len(CAUTION) else 0))
    grouped = len(rows) > GROUP_WHEN_MORE_THAN and len({r.group for r in rows}) > 1
    ordered = rows
    if grouped:
        first: dict[str, tuple] = {}
        for r in rows:
            first.setdefault(r.group, r.urgency)
        ordered = sorted(rows, key=lambda r: (first[r.group], r.urgency))
    body: list[Any] = []
    table = _table(w, show_header=True)
    shown, current, lines_used = 0, None, 1
    for r in ordered:
        if lines_used >= room:
            break
        if grouped and r.group != current:
            if lines_used + 2 > room:
                break
            if table.row_count or table.show_header:
                body.append(table)
            current = r.group
            n = sum(1 for x in rows if x.group == current)
            body.append(
                Text(f"{current} ({n})", style="bold underline", no_wrap=True, overflow="ellipsis")
            )
            table = _table(w, show_header=False)
            lines_used += 1
        sym, style = STATE_LOOK.get(r.state, ("·", ""))
        word = str(r.state)
        label = Text(f"{sym} {word}", style=style)
        if r.alert and r.alert.endswith("+ack"):
            label.append(" ack", style="dim")
        name = r.item
        if grouped and current is not None and name.startswith(current + "/"):
            name = name[len(current) + 1 :]
        if r.defrost:
            name += " (defrost)"  # at the end, which fit_name keeps: new alerts are held
        sign = UNIT_SIGN.get(r.unit, r.unit) if wide else ""
        hot = style if r.state in HOT else ""
        table.add_row(
            label,
            fit_name(name, w["item"]),
            f"{_num(r.value)}{sign}{_arrow(r.trend_per_h)}",
            _num(r.threshold),
            Text(eta_text(r), style=hot),
            _num(r.ambient, "{:.1f}" if wide else "{:.0f}"),
            short_duration(r.tau_s) if r.tau_s else "-",
            Text(sparkline(r.spark, r.threshold, w["spark"]), style="#7fb3d5"),
        )
        shown += 1
        lines_used += 1
        for lv in r.levels:
            if lines_used >= room:
                break
            lsym, lstyle = STATE_LOOK.get(lv.state, ("·", ""))
            eta, note = eta_text(lv), level_note(lv, board.now)
            if not wide:  # the deadline beside the ETA, the chance or budget in the last column
                eta, note = narrow_level(lv, board.now)
            table.add_row(
                Text(f"  {lsym} {lv.state}", style=lstyle if lv.state in HOT else "dim"),
                fit_name(f"└ {lv.name}", w["item"]),
                "",
                _num(lv.threshold),
                Text(eta, style=lstyle if lv.state in HOT else "dim"),
                "",
                "",
                Text(note, style="dim", no_wrap=True, overflow="crop"),
            )
            lines_used += 1
    body.append(table)
    parts: list[Any] = [header_text(board)]
    counts = {s: sum(1 for r in board.rows if r.state == s) for s in RANK}
    summary = ", ".join(f"{n} {s}" for s, n in counts.items() if n)
    parts.append(Text(f"{len(board.rows)} items: {summary or 'none yet'}", style="dim"))
    parts += body
    if shown < len(rows):
        parts.append(Text(f"… {len(rows) - shown} more (filter with / or a)", style="dim"))
    keys = "keys: q quit · a attention only · / filter · esc clear"
    if typing:
        keys = f"filter: {text_filter}_  (enter to keep, esc to clear)"
    elif text_filter or attention_only:
        keys += f"   [showing: {'attention only ' if attention_only else ''}{text_filter!r}]"
    parts.append(Text(keys, style="dim"))
    parts.append(Text(CAUTION, style="italic"))
    return Group(*parts)


def plain_lines(board: Board) -> list[str]:
    """The frame as plain lines (stdout not a terminal): one for the daemon, one per item."""
    out = [header_text(board).plain]
    for r in visible(board):
        out.append(
            f"{r.item} {r.state} now {_num(r.value)} {r.unit} {r.kind} {_num(r.threshold)} "
            f"eta {eta_text(r)} ambient {_num(r.ambient)} tau {duration(r.tau_s)}"
            + (f" alert {r.alert}" if r.alert else "")
            + (" defrost" if r.defrost else "")
            + (f" episode {r.episode}" if r.episode else "")
        )
        for lv in r.levels:
            note = level_note(lv, board.now)
            out.append(
                f"  {lv.name} {lv.kind} {_num(lv.threshold)} {lv.state} eta {eta_text(lv)}"
                + (f" {note}" if note else "")
            )
    return out


# -- the loops --------------------------------------------------------------------------------
def watch(
    store: Any,
    console: Console,
    *,
    refresh_s: float = 2.0,
    once: bool = False,
    stats=None,
    stop=None,
    now_fn=None,
) -> int:
    """Show the board until the user presses q (or ``stop`` is set); plain lines when not a tty.

    ``now_fn`` is the service's clock when it runs simulated time (the demo), so countdowns and
    ages are counted in the same time as the forecasts."""
    import sys

    def board() -> Board:
        return collect(store, now_fn() if now_fn else None, stats=stats() if stats else None)

    if once or not console.is_terminal:
        while True:
            for line in plain_lines(board()):
                print(line, flush=True)
            if once:
                return 0
            if stop is not None:
                if stop.wait(refresh_s):
                    return 0
            else:
                time.sleep(refresh_s)
    from rich.live import Live
    from thermeta.daemon.views.keys import KeyReader

    state: ViewState = {"filter": "", "attention": False, "typing": False}
    with (
        KeyReader(sys.stdin) as keys,
        Live(console=console, screen=True, auto_refresh=False) as live,
    ):
        next_frame = 0.0
        while stop is None or not stop.is_set():
            if time.monotonic() >= next_frame:
                size = console.size
                live.update(
                    render(
                        board(),
                        size.width,
                        size.height,
                        text_filter=state["filter"],
                        attention_only=state["attention"],
                        typing=state["typing"],
                    ),
                    refresh=True,
                )
                next_frame = time.monotonic() + refresh_s
            key = keys.read(min(0.25, refresh_s))
            if key is None:
                continue
            if _on_key(state, key):
                return 0
            next_frame = 0.0
    return 0


def _on_key(state: ViewState, key: str) -> bool:
    """Apply one key press; True means quit."""
    if state["typing"]:
        if key in ("\r", "\n"):
            state["typing"] = False
        elif key == "\x1b":
            state["typing"], state["filter"] = False, ""
        elif key in ("\x7f", "\b"):
            state["filter"] = state["filter"][:-1]
        elif key.isprintable():
            state["filter"] += key
        return False
    if key in ("q", "Q", "\x03"):
        return True
    if key == "a":
        state["attention"] = not state["attention"]
    elif key == "/":
        state["typing"], state["filter"] = True, ""
    elif key == "\x1b":
        state["filter"], state["attention"] = "", False
    return False


def run_foreground(service: Any, stop: Any = None) -> None:
    """``thermeta run --dashboard``: the board in this terminal until q (or ``stop`` is set)."""
    import logging

    console = Console()
    quiet = []
    for h in logging.getLogger().handlers:  # log lines to the terminal would tear the frame
        if (
            isinstance(h, logging.StreamHandler)
            and not isinstance(h, logging.FileHandler)
            and console.is_terminal
        ):
            quiet.append((h, h.level))
            h.setLevel(logging.CRITICAL)
    try:
        watch(
            service.store, console, stats=lambda: service.stats, stop=stop, now_fn=service.clock.now
        )
    finally:
        for h, level in quiet:
            h.setLevel(level)
        if stop is not None:
            stop.set()
