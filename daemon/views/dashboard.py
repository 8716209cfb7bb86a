"""The terminal dashboard: every item's forecast at a glance, read from the store.

    collect(store, now)            -> Board (header facts + one Row per item; board.py)
    render(board, width, height)   -> a rich renderable (fresh each frame)
    watch(store, console, ...)     the loop behind ``thermeta watch`` (and ``run --dashboard``)

The look follows the time left, not a ladder of states: a row is plain while the early end of
its interval is beyond ``lead``; one accent inside ``lead``; reversed colours once past (a limit
crossed, a target missed); dim when there is no data to judge by (stale, learning, waiting).
Rows come in that order, soonest first.  The colour never carries meaning alone: every row has
its state as a symbol and a word, and the time left in words, so the board reads the same on a
light or a dark terminal and without colour (``NO_COLOR``, which rich honours).  Under the items,
the newest alerts and whether their hooks took them.  When stdout is not a terminal, plain lines
are printed instead.
"""

from __future__ import annotations

import time
from typing import Any, TypedDict

from rich.console import Console, Group, JustifyMethod
from rich.table import Table
from rich.text import Text
from thermeta.daemon.alerts.message import CAUTION
from thermeta.daemon.timefmt import clock, duration
from thermeta.daemon.views.board import Board, LevelLine, Row, collect
from thermeta.daemon.views.rowtext import (
    NARROW_DUE,
    NOTE_ROOM,
    STYLE,
    SYMBOL,
    Look,
    due_text,
    level_note,
    level_text,
    look,
    narrow_level,
    now_text,
    order_key,
    range_text,
    rate_text,
    sparkline,
    temp,
    visible,
    when_text,
)


class ViewState(TypedDict):
    """What the keys have chosen to show."""

    filter: str  # only items whose name holds this
    attention: bool  # only items that need attention
    typing: bool  # the filter is being typed


GROUP_WHEN_MORE_THAN = 10
ALERT_LINES = 3  # the newest alerts under the items, when there is room


def header_text(board: Board) -> Text:
    t = Text()
    if not board.running:
        ago = (
            f", last heartbeat {duration(board.now - board.heartbeat_at)} ago"
            if board.heartbeat_at
            else ""
        )
        t.append(f"✖ service not running{ago}", style=STYLE[Look.PAST])
    elif board.connected:
        t.append(f"● broker {board.broker} connected")
    else:
        t.append(f"✖ broker {board.broker} not connected", style=STYLE[Look.PAST])
    t.append(f" · {rate_text(board.readings_per_s)}")
    if board.alerts_waiting:
        t.append(f" · {board.alerts_waiting} alerts waiting for hooks", style=STYLE[Look.SOON])
    t.no_wrap, t.overflow = True, "ellipsis"
    return t


def summary_text(board: Board) -> Text:
    """The second line: the items by look, the last refit, the readings set aside."""
    counts = {lk: sum(1 for r in board.rows if look(r) == lk) for lk in Look}
    words = {Look.PAST: "past", Look.SOON: "soon", Look.NO_DATA: "no data", Look.CALM: "calm"}
    summary = ", ".join(f"{n} {words[lk]}" for lk, n in counts.items() if n)
    refit = (
        "never"
        if board.last_refit_at is None
        else f"{duration(board.now - board.last_refit_at)} ago"
    )
    dead = "-" if board.dead_letters is None else board.dead_letters
    return Text(
        f"{len(board.rows)} items: {summary or 'none yet'} · refit {refit} · {dead} set aside",
        style="dim",
        no_wrap=True,
        overflow="ellipsis",
    )


COLUMNS: tuple[tuple[str, str, JustifyMethod], ...] = (
    ("state", "state", "left"),
    ("item", "item", "left"),
    ("now", "now", "right"),
    ("level", "level", "right"),
    ("due", "due in", "right"),
    ("range", "90 % range", "left"),
    ("ambient", "ambient", "right"),
    ("tau", "time constant", "right"),
    ("spark", "last 3 h", "left"),
)


def column_widths(width: int) -> dict[str, int]:
    """Fixed widths, the same for every group's table so the columns line up; the item name and,
    on a wide screen, the sparkline take what is left.  A narrow screen shows the interval in
    the "due in" column and leaves the technical figures out."""
    if width >= 110:
        w = {"state": 15, "now": 12, "level": 10, "due": 11, "range": NOTE_ROOM}
        if width >= 150:
            w.update(ambient=9, tau=13)
        rest = width - sum(w.values()) - len(w) - 1
        w["item"] = min(36, max(16, rest - 12))
        w["spark"] = max(0, rest - w["item"])
    else:
        w = {"state": 15, "now": 11, "level": 9, "due": NARROW_DUE}
        w["item"] = max(8, width - sum(w.values()) - len(w))
    return w


def fit_name(name: str, width: int) -> str:
    """The name, or its start and end (the telling parts of a topic-like name) around a '…'."""
    if len(name) <= width:
        return name
    head = (width - 1) // 2
    return name[:head] + "…" + name[-(width - 1 - head) :]


def _table(w: dict[str, int], show_header: bool) -> Table:
    table = Table(
        box=None,
        padding=(0, 1, 0, 0),
        pad_edge=False,
        expand=False,
        show_edge=False,
        header_style="bold underline",
        show_header=show_header,
    )
    for key, title, justify in COLUMNS:
        if w.get(key):
            if key == "due" and "range" not in w:
                title = "due in (90 %)"
            table.add_column(title, width=w[key], justify=justify, no_wrap=True, overflow="crop")
    return table


def _cells(w: dict[str, int], **cells: Any) -> list[Any]:
    return [cells.get(key, "") for key, _, _ in COLUMNS if w.get(key)]


def _row_cells(r: Row, w: dict[str, int], name: str) -> list[Any]:
    lk = look(r)
    style = STYLE[lk]
    label = Text(f"{SYMBOL.get(r.state, '·')} {r.state}", style=style)
    if r.alert and r.alert.endswith("+ack"):
        label.append(" ack")
    wide = "range" in w
    due = due_text(r) if wide else when_text(r)
    return _cells(
        w,
        state=label,
        item=Text(fit_name(name, w["item"]), style="dim" if lk == Look.NO_DATA else ""),
        now=Text(now_text(r), style="dim" if r.value is None or lk == Look.NO_DATA else ""),
        level=level_text(r.threshold, r.unit, r.kind),
        due=Text(due, style=style),
        range=Text(range_text(r), style=style if lk == Look.SOON else ""),
        ambient=temp(r.ambient, r.unit),
        tau=duration(r.tau_s) if r.tau_s and r.tau_s >= 1.0 else "-",
        spark=Text(sparkline(r.spark, r.threshold, w.get("spark", 0)), style="dim"),
    )


def _level_cells(lv: LevelLine, r: Row, w: dict[str, int], now: float) -> list[Any]:
    lk = look(lv, r.lead_s)
    style = STYLE[lk] if lk <= Look.SOON else "dim"
    wide = "range" in w
    note = level_note(lv, now)
    due = due_text(lv) if wide else narrow_level(lv, now)
    return _cells(
        w,
        state=Text(f"  {SYMBOL.get(lv.state, '·')} {lv.state}", style=style),
        item=Text(fit_name(f"└ {lv.name}", w["item"]), style="dim"),
        level=level_text(lv.threshold, r.unit, lv.kind),
        due=Text(due, style=style),
        # on a wide screen the deadline or allowance takes the interval's place (the item's own
        # row shows its focus level's interval)
        range=Text(note or range_text(lv), style=style if not note else "dim"),
    )


def alert_lines(board: Board, width: int, n: int) -> list[Text]:
    """The newest alerts, newest first: clock time, headline, and whether the hooks took it."""
    out = []
    for a in board.alerts[:n]:
        tail = f"  [{a.delivery}]"
        head = f"{clock(a.at, board.now)}  "
        room = max(10, width - len(head) - len(tail) - 2)
        text = a.headline if len(a.headline) <= room else a.headline[: room - 1] + "…"
        line = Text("  " + head + text)
        line.append(tail, style=STYLE[Look.SOON] if a.delivery != "sent" else "dim")
        out.append(line)
    return out


def render(
    board: Board,
    width: int = 80,
    height: int = 24,
    *,
    text_filter: str = "",
    attention_only: bool = False,
    typing: bool = False,
) -> Group:
    """One frame: header, the items (grouped when many), the newest alerts, key help and the
    caution line."""
    rows = visible(board, text_filter, attention_only)
    w = column_widths(width)
    n_alerts = min(ALERT_LINES, len(board.alerts)) if height >= 20 else 0
    room = max(
        1, height - 6 - (1 if width < len(CAUTION) else 0) - (n_alerts + 1 if n_alerts else 0)
    )
    grouped = len(rows) > GROUP_WHEN_MORE_THAN and len({r.group for r in rows}) > 1
    ordered = rows
    if grouped:
        first: dict[str, tuple] = {}
        for r in rows:
            first.setdefault(r.group, order_key(r))
        ordered = sorted(rows, key=lambda r: (first[r.group], order_key(r)))
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
            body.append(Text(f"{current} ({n})", style="bold", no_wrap=True, overflow="ellipsis"))
            table = _table(w, show_header=False)
            lines_used += 1
        name = r.item
        if grouped and current is not None and name.startswith(current + "/"):
            name = name[len(current) + 1 :]
        if r.episode:
            name += f" [{r.episode}]"
        if r.defrost:
            name += " (defrost)"  # new alerts are held
        if len(name) > w["item"] and r.defrost:
            name = fit_name(name[: -len(" (defrost)")], w["item"] - 10) + " (defrost)"
        table.add_row(*_row_cells(r, w, name))
        shown += 1
        lines_used += 1
        for lv in r.levels:
            if lines_used >= room:
                break
            table.add_row(*_level_cells(lv, r, w, board.now))
            lines_used += 1
    body.append(table)
    parts: list[Any] = [header_text(board), summary_text(board)]
    parts += body
    if shown < len(rows):
        parts.append(Text(f"… {len(rows) - shown} more (filter with / or a)", style="dim"))
    if n_alerts:
        parts.append(Text("newest alerts", style="bold"))
        parts += alert_lines(board, width, n_alerts)
    keys = "keys: q quit · a attention only · / filter · esc clear"
    if typing:
        keys = f"filter: {text_filter}_  (enter to keep, esc to clear)"
    elif text_filter or attention_only:
        keys += f"   [showing: {'attention only ' if attention_only else ''}{text_filter!r}]"
    parts.append(Text(keys, style="dim"))
    parts.append(Text(CAUTION, style="italic"))
    return Group(*parts)


def plain_lines(board: Board) -> list[str]:
    """The frame as plain lines (stdout not a terminal): one for the service, one per item, one
    per level, the newest alerts; the same words and units as the screen."""
    out = [header_text(board).plain, summary_text(board).plain]
    for r in visible(board):
        rng = range_text(r)
        out.append(
            f"{r.item} {SYMBOL.get(r.state, '·')} {r.state} now {now_text(r)} {r.kind} "
            f"{level_text(r.threshold, r.unit, 'limit')} due {due_text(r)}"
            + (f" (90 %: {rng})" if rng else "")
            + (f" ambient {temp(r.ambient, r.unit)}" if r.ambient is not None else "")
            + (f" time constant {duration(r.tau_s)}" if r.tau_s and r.tau_s >= 1.0 else "")
            + (f" alert {r.alert}" if r.alert else "")
            + (" defrost" if r.defrost else "")
            + (f" episode {r.episode}" if r.episode else "")
        )
        for lv in r.levels:
            note = level_note(lv, board.now)
            rng = range_text(lv)
            out.append(
                f"  {lv.name} {lv.kind} {level_text(lv.threshold, r.unit, 'limit')} {lv.state} "
                f"due {due_text(lv)}"
                + (f" (90 %: {rng})" if rng else "")
                + (f"; {note}" if note else "")
            )
    for a in board.alerts:
        out.append(f"alert {clock(a.at, board.now)} {a.headline} [{a.delivery}]")
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
