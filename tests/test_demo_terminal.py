"""`thermeta demo` in a real terminal (tmux, 100x30): forecasts with an early warning show within
seconds, the board keeps its layout facts at 100 columns, and the demo stops cleanly when
asked."""

from __future__ import annotations

import re
import shutil
import subprocess
import sys
import time
import uuid

STATE_ROW = re.compile(r"^\s*[▲●○✔✖?✗!] ([a-z_]+)\s+(\S+)")
SOCKET = f"thermeta-demo-{uuid.uuid4().hex[:8]}"  # a tmux server of its own: its own pane size


def _tmux(*args: str) -> subprocess.CompletedProcess:
    return subprocess.run(["tmux", "-L", SOCKET, *args], capture_output=True, text=True, timeout=30)


def _layout_problems(screen: str, width: int, names: set[str]) -> list[str]:
    """What an operator would misread on the board: lines too wide, a temperature without its
    unit, an interval shown as '[0s-∞]', a '0s' time, a name cut from the left."""
    out = []
    for line in screen.splitlines():
        if len(line) > width:
            out.append(f"wider than {width}: {line!r}")
        if "[0s" in line or "∞" in line or re.search(r"\b0s\b", line):
            out.append(f"0s or ∞: {line!r}")
        m = STATE_ROW.match(line)
        if m is None or "broker" in line:
            continue
        for num in re.finditer(r"-?\d+\.\d(?!\d)", line):
            if line[num.end() : num.end() + 3] != " °C":
                out.append(f"a temperature without its unit: {line!r}")
        name = m.group(2)
        if name != "└" and name not in names:
            out.append(f"a name cut or unknown: {name!r} in {line!r}")
    return out


def test_demo_in_a_terminal_shows_an_early_warning_and_stops_on_request():
    """In a 100x30 tmux pane `thermeta demo --embedded --speed 200` shows items approaching their
    limits within 40 s; the board then keeps every line within 100 columns, every temperature
    with its unit, no '[0s-∞]' or '0s', and every item's name whole (the site as the group's
    header, the rest of the name from its start); q then Ctrl-C end it within 15 s.  tmux is
    installed by .ci/run."""
    from thermeta.daemon.simulation.scenarios import build

    assert shutil.which("tmux"), "tmux is needed (apt-get install tmux; .ci/run installs it)"
    names = {p.name.rsplit("/", 1)[-1] for p in build("all").loads}
    session = f"thermeta-test-{uuid.uuid4().hex[:8]}"
    demo = f"{sys.executable} -m thermeta.daemon.cli demo --embedded --speed 200"
    cmd = f"env TERM=xterm-256color {demo}"
    assert _tmux("new-session", "-d", "-s", session, "-x", "100", "-y", "30", cmd).returncode == 0
    try:
        screen = ""
        deadline = time.monotonic() + 40
        while time.monotonic() < deadline:
            screen = _tmux("capture-pane", "-p", "-t", session).stdout
            if "approaching" in screen:
                break
            time.sleep(0.5)
        assert "approaching" in screen, screen
        assert "Forecasts support decisions" in screen, screen
        time.sleep(2.0)  # a later frame too: the alerts' lines and more forecasts
        later = _tmux("capture-pane", "-p", "-t", session).stdout
        for frame in (screen, later):
            assert not _layout_problems(frame, 100, names), frame
        rows = [ln for ln in later.splitlines() if STATE_ROW.match(ln) and "broker" not in ln]
        assert len(rows) >= 8, later  # the board is not empty: items and their levels
        _tmux("send-keys", "-t", session, "q")
        time.sleep(1.0)
        _tmux("send-keys", "-t", session, "C-c")
        deadline = time.monotonic() + 15
        while time.monotonic() < deadline and _tmux("has-session", "-t", session).returncode == 0:
            time.sleep(0.3)
        assert _tmux("has-session", "-t", session).returncode != 0, "the demo did not stop"
    finally:
        _tmux("kill-server")
