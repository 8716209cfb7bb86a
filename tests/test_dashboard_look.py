"""The dashboard's look in a real terminal: ``thermeta watch`` in tmux panes of 80x24 and 120x40,
captured with their escape codes (``capture-pane -e``), with colour and with ``NO_COLOR``.

The look follows the time left: the crossed row in reversed colours, the approaching rows in the
one accent colour, the stale row dim, the steady row plain; without colour the reverse and the
bold stay and every row still says its state in a symbol and a word.  Layout facts: every line
fits, temperatures keep their unit at 80 columns, no '[0s-∞]' and no '0s' anywhere."""

from __future__ import annotations

import re
import shutil
import subprocess
import sys
import time
import uuid

import pytest
from test_dashboard import fill_store

SGR = re.compile(r"\x1b\[([0-9;]*)m")


def _pane(tmp_path, width: int, height: int, no_color: bool) -> str:
    """The pane's text with escape codes once the board is drawn."""
    if shutil.which("tmux") is None:
        pytest.fail("tmux is needed for the terminal test (apt-get install tmux)")
    url = f"sqlite:///{tmp_path / 's.db'}"
    if not (tmp_path / "s.db").exists():
        fill_store(url).close()
    cfg = tmp_path / "c.toml"
    cfg.write_text(
        f'[storage]\nurl = "{url}"\n[[item]]\nname = "x"\ntopic = "x/y"\nthreshold = 1.0\n'
    )
    sock = f"thermeta-look-{uuid.uuid4().hex[:8]}"
    env = "NO_COLOR=1 " if no_color else ""
    cmd = (
        f"env TERM=xterm-256color {env}{sys.executable} -m thermeta.daemon.cli watch --config {cfg}"
    )
    subprocess.run(
        ["tmux", "-L", sock, "new-session", "-d", "-s", "look", "-x", str(width), "-y", str(height)]
        + [cmd],
        check=True,
        timeout=20,
    )
    try:
        deadline = time.monotonic() + 20
        text = ""
        while time.monotonic() < deadline:
            text = subprocess.run(
                ["tmux", "-L", sock, "capture-pane", "-e", "-p", "-t", "look"],
                capture_output=True,
                text=True,
                timeout=10,
            ).stdout
            if "Forecasts support decisions" in text and "reefer-07" in text:
                return text
            time.sleep(0.2)
        raise AssertionError(f"the board never appeared:\n{text}")
    finally:
        subprocess.run(["tmux", "-L", sock, "kill-server"], capture_output=True, timeout=10)


def _line(text: str, needle: str) -> str:
    return next(ln for ln in text.splitlines() if needle in SGR.sub("", ln))


def _codes(line: str) -> set[str]:
    return {c for m in SGR.finditer(line) for c in m.group(1).split(";") if c}


@pytest.mark.parametrize("width,height", [(80, 24), (120, 40)])
def test_the_look_follows_the_time_left_in_a_real_terminal(tmp_path, width, height):
    """Colour: reverse (7) on the crossed row, the accent (magenta, 35) on the approaching
    ones, dim (2) on the stale one, none of those on the steady one.  NO_COLOR: no colour code
    at all, the reverse and the words still there."""
    coloured = _pane(tmp_path, width, height, no_color=False)
    plain = SGR.sub("", coloured)
    lines = plain.splitlines()
    assert all(len(ln) <= width for ln in lines)
    for name in ("blast-2", "trailer-4", "trailer-9", "cellar-b", "reefer-07"):
        row = _line(coloured, name)
        assert "°C" in SGR.sub("", row), row  # the unit stays, even at 80 columns
    assert "∞" not in plain and "[0s" not in plain and not re.search(r"\b0s\b", plain)
    assert "27 min to 1 h 08 min" in plain  # the interval in the one format
    assert "7" in _codes(_line(coloured, "blast-2"))
    assert "35" in _codes(_line(coloured, "trailer-4"))
    assert "2" in _codes(_line(coloured, "cellar-b"))
    assert not {"7", "35"} & _codes(_line(coloured, "reefer-07"))

    bare = _pane(tmp_path, width, height, no_color=True)
    # SGR 30-38 and 90-97 set a foreground colour, 40-48 and 100-107 a background (ECMA-48)
    colours = {c for c in _codes(bare) if 30 <= int(c) <= 38 or 40 <= int(c) <= 48 or int(c) >= 90}
    assert not colours, colours
    assert "7" in _codes(_line(bare, "blast-2"))  # reversed colours need no colour
    for word in ("✖ crossed", "▲ approaching", "? stale", "● steady"):
        assert word in SGR.sub("", bare)
