"""`thermeta demo` in a real terminal (tmux): forecasts with an early warning show within seconds,
and the demo stops cleanly when asked."""

from __future__ import annotations

import shutil
import subprocess
import sys
import time
import uuid


def _tmux(*args: str) -> subprocess.CompletedProcess:
    return subprocess.run(["tmux", *args], capture_output=True, text=True, timeout=30)


def test_demo_in_a_terminal_shows_an_early_warning_and_stops_on_request():
    """In a 100x30 tmux pane `thermeta demo --embedded --speed 120` shows items approaching their
    limits within 40 s (the dashboard, or its line fallback), and q then Ctrl-C end it within 15 s.
    tmux is installed by .ci/run."""
    assert shutil.which("tmux"), "tmux is needed (apt-get install tmux; .ci/run installs it)"
    session = f"thermeta-test-{uuid.uuid4().hex[:8]}"
    cmd = f"{sys.executable} -m thermeta.daemon.cli demo --embedded --speed 120"
    assert _tmux("new-session", "-d", "-s", session, "-x", "100", "-y", "30", cmd).returncode == 0
    try:
        screen = ""
        deadline = time.monotonic() + 40
        while time.monotonic() < deadline:
            screen = _tmux("capture-pane", "-p", "-t", session).stdout
            if "approaching" in screen:
                break
            time.sleep(1.0)
        assert "approaching" in screen, screen
        assert "Forecasts support decisions" in screen or "forecast " in screen, screen
        _tmux("send-keys", "-t", session, "q")
        time.sleep(1.0)
        _tmux("send-keys", "-t", session, "C-c")
        deadline = time.monotonic() + 15
        while time.monotonic() < deadline and _tmux("has-session", "-t", session).returncode == 0:
            time.sleep(0.3)
        assert _tmux("has-session", "-t", session).returncode != 0, "the demo did not stop"
    finally:
        _tmux("kill-session", "-t", session)
