"""The dashboard: rendered to text from a real store at 80x24 and 120x40 (urgency order, words
beside every colour, the caution line), grouping, filter keys, plain lines when stdout is not a
terminal, and ``thermeta watch`` in a real terminal (tmux) beside a running daemon."""

from __future__ import annotations

import io
import json
import math
import os
import shutil
import subprocess
import sys
import time
import uuid

import pytest
from rich.console import Console
from thermeta.daemon.views.dashboard import (
    _on_key,
    collect,
    due_text,
    range_text,
    rate_text,
    render,
    sparkline,
)
from thermeta.predictors.result import rfc3339
from thermeta.storage.store import Store

NOW = 1_800_000_000.0
CAUTION_START = "Forecasts support decisions"


def fill_store(url: str, n_extra: int = 0) -> Store:
    """Five items in known states, readings for their sparklines (invented demo numbers)."""
    store = Store(url)
    store.create_all()
    items = [  # name, state, value, threshold, eta_s, lo, hi, site
        ("reefer-07", "steady", 3.1, 8.0, None, None, None, "north-yard"),
        ("trailer-4", "approaching", -16.4, -15.0, 2520.0, 1620.0, 4080.0, "north-yard"),
        ("kitchen/blast-2", "crossed", 22.5, 21.0, 0.0, 0.0, 0.0, "kitchen"),
        ("cellar-b", "stale", 11.0, 14.0, None, None, None, "cellar"),
        ("trailer-9", "approaching", -17.0, -15.0, 9000.0, 7000.0, 11000.0, "north-yard"),
    ]
    items += [
        (f"crate-{i:02d}", "steady", 2.0 + 0.1 * i, 8.0, None, None, None, f"room-{i % 3}")
        for i in range(n_extra)
    ]
    for name, state, v, thr, eta, lo, hi, site in items:
        iid = store.ensure_item(name, now=NOW)
        rows = [(iid, NOW - 3 * 3600 + 60 * k, v - 0.002 * (180 - k), 0, NOW) for k in range(181)]
        store.write_batch(rows)
        body = {
            "item": name,
            "state": state,
            "value_now": v,
            "threshold": thr,
            "unit": "C",
            "eta_s": eta,
            "eta_lo_s": lo,
            "eta_hi_s": hi,
            "ambient": 12.0,
            "time_constant_s": 36000.0,
            "last_reading_at": rfc3339(NOW),
            "site": site,
            "direction": "rising",
            "fit_ok": True,
            "warnings": [],
        }
        store.save_forecast(iid, NOW, state, body, NOW)
    store.set_meta(
        "daemon",
        {
            "state": "running",
            "heartbeat_at": NOW - 2,
            "connected": True,
            "broker": "127.0.0.1:1883",
            "readings_per_s": 12.5,
            "dead_letters": 3,
        },
    )
    store.set_meta("last_refit_at", NOW - 8)
    return store


def text_of(store: Store, width: int, height: int, **kw) -> str:
    console = Console(file=io.StringIO(), width=width, height=height, color_system=None)
    console.print(render(collect(store, NOW), width, height, **kw))
    return console.file.getvalue()


@pytest.mark.parametrize("width,height", [(80, 24), (120, 40)])
def test_render_shows_items_in_urgency_order_with_words(tmp_path, width, height):
    """Crossed first, then approaching by the early end of the interval, then stale, then
    steady; each state as a symbol and a word; header facts; the caution; fits the screen."""
    store = fill_store(f"sqlite:///{tmp_path / 's.db'}")
    out = text_of(store, width, height)
    lines = out.splitlines()
    assert len(lines) <= height
    assert all(len(line) <= width for line in lines)
    order = [
        name
        for line in lines
        for name in ("blast-2", "trailer-4", "trailer-9", "cellar-b", "reefer-07")
        if name in line
    ]
    assert order == ["blast-2", "trailer-4", "trailer-9", "cellar-b", "reefer-07"]
    assert "kitchen/blast-2" in out
    for word in ("✖ crossed", "▲ approaching", "? stale", "● steady"):
        assert word in out
    # the time left with its interval, in the one format; temperatures with their unit
    assert "27 min to 1 h 08 min" in out and "-16.4 °C" in out and "-15 °C" in out
    assert "12.5 readings/s" in out and "3 set aside" in out and "refit 8 min ago" not in out
    assert "refit under 1 min ago" in out
    assert "connected" in lines[0]
    assert CAUTION_START in out
    store.close()


def test_many_items_are_grouped_by_site_most_urgent_group_first(tmp_path):
    """With more than ten items, site groups appear as headings, the group holding the crossed
    item first; rows that do not fit are counted, not silently dropped."""
    store = fill_store(f"sqlite:///{tmp_path / 's.db'}", n_extra=12)
    out = text_of(store, 80, 24)
    heads = [
        line.split(" (")[0]
        for line in map(str.strip, out.splitlines())
        if line.endswith(")")
        and line[0].isalpha()
        and "items" not in line
        and not line.startswith("state ")
    ]
    assert heads[:2] == ["kitchen", "north-yard"]
    assert "more (filter with / or a)" in out
    wide = text_of(store, 120, 60)
    assert "… " not in wide.split("keys:")[0].splitlines()[-1]
    store.close()


def test_filter_keys_and_attention_view(tmp_path):
    """'/' then text filters by name, Enter keeps it, Esc clears; 'a' shows only items that need
    attention; 'q' quits."""
    store = fill_store(f"sqlite:///{tmp_path / 's.db'}")
    state = {"filter": "", "attention": False, "typing": False}
    for key in "/trail\r":
        assert _on_key(state, key) is False
    assert state == {"filter": "trail", "attention": False, "typing": False}
    out = text_of(store, 80, 24, text_filter=state["filter"])
    assert "trailer-4" in out and "reefer-07" not in out
    _on_key(state, "\x1b")
    _on_key(state, "a")
    out = text_of(store, 80, 24, attention_only=state["attention"])
    assert "reefer-07" not in out and "cellar-b" in out and "blast-2" in out
    assert _on_key(state, "q") is True
    store.close()


def test_sparkline_and_time_left_formats():
    """Eight levels from low to high, blanks where no reading; the time left in the one format
    of the alerts, an interval that rounds to one value shown once, an open end in words."""
    from thermeta.daemon.views.board import Row

    assert sparkline([0, 1, 2, 3, 4, 5, 6, 7], None, 8) == "▁▂▃▄▅▆▇█"
    assert sparkline([math.nan, 1.0], None, 2)[0] == " "
    r = Row(item="x", state="approaching", eta_s=4500.0, eta_lo_s=4490.0, eta_hi_s=4510.0)
    assert (due_text(r), range_text(r)) == ("1 h 15 min", "1 h 15 min")
    r = Row(item="x", state="approaching", eta_s=600.0, eta_lo_s=0.0, eta_hi_s=None)
    assert range_text(r) == "under 1 min or later"
    assert due_text(Row(item="x", state="crossed", eta_s=0.0)) == "past it"
    # the best fit never crosses but the interval has an early end: that end, not "no crossing"
    r = Row(item="x", state="steady", eta_s=None, eta_lo_s=6540.0, eta_hi_s=None)
    assert (due_text(r), range_text(r)) == ("1 h 49 min or later", "")
    assert due_text(Row(item="x", state="steady", eta_s=None)) == "no crossing"
    # a slow feed reads as its rate per minute, never "0.0 readings/s"
    assert [rate_text(v) for v in (12.5, 0.05, None)] == [
        "12.5 readings/s",
        "3.0 readings/min",
        "- readings/s",
    ]


def test_watch_prints_plain_lines_when_not_a_terminal(tmp_path):
    """`thermeta watch --once` into a pipe prints one line per item, no escape codes."""
    url = f"sqlite:///{tmp_path / 's.db'}"
    fill_store(url).close()
    cfg = tmp_path / "c.toml"
    cfg.write_text(
        f'[storage]\nurl = "{url}"\n[[item]]\nname = "trailer-4"\n'
        'topic = "fleet/trailer-4/load"\nthreshold = -15.0\n'
    )
    out = subprocess.run(
        [sys.executable, "-m", "thermeta.daemon.cli", "watch", "--config", str(cfg), "--once"],
        capture_output=True,
        text=True,
        timeout=60,
        check=False,
    )
    assert out.returncode == 0, out.stderr
    lines = out.stdout.splitlines()
    assert "\x1b[" not in out.stdout
    assert lines[2].startswith("kitchen/blast-2 ✖ crossed now 22.5 °C")
    assert any(
        line.startswith("trailer-4 ▲ approaching")
        and "due 42 min (90 %: 27 min to 1 h 08 min)" in line
        for line in lines
    )
    assert not any(" C " in line for line in lines)


# -- a real terminal -------------------------------------------------------------------------
def _daemon_meta(store: Store) -> dict:
    """The daemon's heartbeat, or {} while it has not made its tables yet."""
    from sqlalchemy import inspect

    if not inspect(store.engine).has_table("meta"):
        return {}
    return store.get_meta("daemon") or {}


def _tmux(sock: str, *args: str) -> str:
    return subprocess.run(
        ["tmux", "-L", sock, *args], capture_output=True, text=True, timeout=20, check=False
    ).stdout


def _wait_pane(sock: str, needle: str, timeout: float = 20.0) -> str:
    deadline = time.monotonic() + timeout
    text = ""
    while time.monotonic() < deadline:
        text = _tmux(sock, "capture-pane", "-p", "-t", "dash")
        if needle in text:
            return text
        time.sleep(0.2)
    raise AssertionError(f"{needle!r} never appeared; the pane shows:\n{text}")


def test_watch_in_tmux_beside_a_running_daemon(broker, tmp_path):
    """The daemon ingests a warming curve from mosquitto_pub; `thermeta watch` in an 80x24 tmux
    pane shows the item, its state word, the connected broker and the caution; '/' filters;
    'q' quits and the pane closes."""
    if shutil.which("tmux") is None:
        pytest.fail("tmux is needed for the terminal test (apt-get install tmux)")
    cfg = tmp_path / "c.toml"
    cfg.write_text(f"""
[broker]
port = {broker.port}
client_id = "thermeta-dash-test"
[storage]
url = "sqlite:///{tmp_path / "d.db"}"
batch_ms = 20
[fit]
refit_every = 1
[[item]]
name = "trailer-4"
topic = "fleet/trailer-4/load"
threshold = -15.0
ambient = 12.0
[[item]]
name = "reefer-07"
topic = "yard/reefer-07/load"
threshold = 8.0
ambient = 27.0
""")
    log = open(tmp_path / "daemon.log", "w")
    daemon = subprocess.Popen(
        [sys.executable, "-m", "thermeta.daemon.cli", "run", "--config", str(cfg)],
        stdout=log,
        stderr=subprocess.STDOUT,
        cwd=tmp_path,
    )
    sock = f"thermeta-test-{uuid.uuid4().hex[:8]}"
    try:
        # A new client id has no session yet: publish only once the daemon has subscribed.
        db_file = tmp_path / "d.db"
        deadline = time.monotonic() + 20
        connected = False
        while not connected and time.monotonic() < deadline:
            time.sleep(0.2)
            if db_file.exists():
                db = Store(f"sqlite:///{db_file}")
                connected = bool(_daemon_meta(db).get("connected"))
                db.close()
        assert connected, (tmp_path / "daemon.log").read_text()
        now = time.time()
        lines = []
        for i in range(40):
            t = now - (40 - i) * 60
            # T = Ta + (T0 - Ta) e^(-k t), Newton's law (invented demo numbers)
            lines.append(
                ("fleet/trailer-4/load", {"ts": t, "value": 12 - 32 * math.exp(-i * 60 / 9000)})
            )
            lines.append(
                ("yard/reefer-07/load", {"ts": t, "value": 27 - 25 * math.exp(-i * 60 / 400000)})
            )
        for topic, body in lines:
            subprocess.run(
                [
                    "mosquitto_pub",
                    "-p",
                    str(broker.port),
                    "-q",
                    "1",
                    "-t",
                    topic,
                    "-m",
                    json.dumps(body),
                ],
                check=True,
                timeout=10,
            )
        env = dict(os.environ, TERM="xterm-256color")
        subprocess.run(
            [
                "tmux",
                "-L",
                sock,
                "new-session",
                "-d",
                "-s",
                "dash",
                "-x",
                "80",
                "-y",
                "24",
                f"{sys.executable} -m thermeta.daemon.cli watch --config {cfg} --interval 0.5",
            ],
            check=True,
            env=env,
            timeout=20,
        )
        text = _wait_pane(sock, "trailer-4")
        text = _wait_pane(sock, "connected")
        assert "reefer-07" in text
        assert CAUTION_START in text
        assert any(w in text for w in ("approaching", "steady", "learning"))
        assert all(len(line) <= 80 for line in text.splitlines())
        _tmux(sock, "send-keys", "-t", "dash", "/", "t", "r", "a", "i", "Enter")
        text = _wait_pane(sock, "showing:")
        assert "trailer-4" in text and "reefer-07" not in text
        _tmux(sock, "send-keys", "-t", "dash", "q")
        deadline = time.monotonic() + 10
        while time.monotonic() < deadline and "dash" in _tmux(sock, "list-sessions"):
            time.sleep(0.2)
        assert "dash" not in _tmux(sock, "list-sessions")
        assert daemon.poll() is None  # the dashboard never disturbed the daemon
    finally:
        subprocess.run(
            ["tmux", "-L", sock, "kill-server"], capture_output=True, timeout=10, check=False
        )
        daemon.terminate()
        daemon.wait(20)
        log.close()
    assert daemon.returncode == 0


def test_an_item_in_defrost_says_so(tmp_path):
    """While the controller's defrost signal is on, new alerts are held (daemon/alerts/rules.py):
    the board says "(defrost)" after the item's name, so an approaching air probe without an alert
    is explained, and the plain lines say it too."""
    from thermeta.daemon.views.dashboard import plain_lines

    store = fill_store(f"sqlite:///{tmp_path / 'd.db'}")
    iid = store.ensure_item("cold-room-a/air", now=NOW)
    store.write_batch([(iid, NOW - 60 * k, 5.0 + 0.01 * k, 0, NOW) for k in range(30)])
    body = {
        "item": "cold-room-a/air",
        "state": "approaching",
        "value_now": 5.0,
        "threshold": 8.0,
        "unit": "C",
        "eta_s": 2400.0,
        "eta_lo_s": 1500.0,
        "eta_hi_s": 4000.0,
        "ambient": 9.0,
        "time_constant_s": 3000.0,
        "last_reading_at": rfc3339(NOW),
        "fit_ok": True,
        "warnings": [],
        "defrost": {"on": True, "started_at": rfc3339(NOW - 900), "ended_at": None},
    }
    store.save_forecast(iid, NOW, "approaching", body, NOW)
    board = collect(store, NOW)
    lines = [ln for ln in text_of(store, 120, 40).splitlines() if "cold-room-a/air" in ln]
    assert len(lines) == 1 and "approaching" in lines[0] and "cold-room-a/air (defrost)" in lines[0]
    others = [ln for ln in text_of(store, 120, 40).splitlines() if "trailer-4" in ln]
    assert others and "defrost" not in others[0]
    plain = [ln for ln in plain_lines(board) if ln.startswith("cold-room-a/air ")]
    assert plain and plain[0].endswith(" defrost")
