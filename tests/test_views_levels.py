"""Levels where people see them: `thermeta status` (text and JSON) and the dashboard, read from a
real SQLite store filled by the refit.  Curves: Newton's law of cooling, closed form."""

from __future__ import annotations

import io
import json
import math
import subprocess
import sys
import tomllib

import numpy as np
from rich.console import Console
from thermeta.daemon.alerts import attach
from thermeta.daemon.clock import ManualClock
from thermeta.daemon.config import parse_config
from thermeta.daemon.service import Service
from thermeta.daemon.views.board import collect
from thermeta.daemon.views.dashboard import plain_lines, render

ITEMS = """
[[item]]
name = "tray-c"
topic = "k/tray-c"
schedule = "food-code-cooling"
ambient = -6.0

[[item]]
name = "fridge-3"
topic = "p/fridge-3"
ambient = 20.0
[[item.level]]
name = "high"
threshold = 8.0
side = "above"
budget = 3600
[[item.level]]
name = "low"
threshold = 2.0
side = "below"
"""


def filled_store(tmp_path):
    """Two and a half hours of a deep tray cooling (tau 170 min from 74 degC in -6 degC air: the
    food-code schedule's first stage will be missed) and of a fridge warming toward 20 degC from
    5 degC after a failure, refitted every 5 minutes up to now."""
    import time

    text = f'[storage]\nurl = "sqlite:///{tmp_path / "s.db"}"\n[fit]\nrefit_every = 300\n{ITEMS}'
    path = tmp_path / "c.toml"
    path.write_text(text)
    cfg = parse_config(tomllib.loads(text), str(path), text)
    t0 = time.time() - 150 * 60
    clock = ManualClock(t0)
    svc = Service(cfg, clock=clock)
    svc.store.create_all()
    plugin = attach(svc)
    plugin.start()
    rng = np.random.default_rng(19)
    tray, fridge = cfg.items
    for i in range(150):
        ts = t0 + 60.0 * i
        for item, v in (
            (tray, -6 + 80 * math.exp(-i / 170.0)),
            (fridge, 20 + (5 - 20) * math.exp(-i / 120.0)),
        ):
            iid = svc.store.ensure_item(item.name, unit="C", topic=item.topic, now=ts)
            svc.store.write_batch([(iid, ts, v + float(rng.normal(0, 0.05)), 0, ts)])
            svc.activity.note(item.name, item, ts)
        clock.set(ts)
        if i % 5 == 4:
            svc.refitter.run_once()
    plugin.stop()
    return path, svc.store


def test_status_and_the_dashboard_show_each_level(tmp_path):
    """`thermeta status --json` carries each item's levels (state, deadline, chance, budget), its
    episode with its tally, and the rolling period's figures; the text adds a line per level; the
    dashboard at 80 columns shows a line per level with the deadline beside the ETA."""
    path, store = filled_store(tmp_path)
    r = subprocess.run(
        [sys.executable, "-m", "thermeta.daemon.cli", "status", "--config", str(path), "--json"],
        capture_output=True,
        text=True,
        timeout=60,
    )
    assert r.returncode == 0, r.stderr
    items = {x["item"]: x for x in json.loads(r.stdout)["per_item"]}
    tray, fridge = items["tray-c"], items["fridge-3"]
    assert tray["state"] == "late" and tray["focus"] == "stage-1" and tray["kind"] == "target"
    s1, s2 = tray["levels"]
    assert (s1["name"], s1["state"], s1["stage"]) == ("stage-1", "late", 1)
    assert s1["chance"] < 0.05 and s1["deadline_at"] is not None
    assert tray["episode"]["started_by"] == "probe" and tray["episode"]["tally"]["mkt"] > 20
    high = fridge["levels"][0]
    assert high["state"] == "crossed" and high["budget"]["state"] in ("running_out", "used_up")
    assert fridge["period"]["beyond"]["high"]["beyond_s"] > 0
    text = subprocess.run(
        [sys.executable, "-m", "thermeta.daemon.cli", "status", "--config", str(path)],
        capture_output=True,
        text=True,
        timeout=60,
    ).stdout
    assert "    stage-1: target 21 °C (below), late" in text
    assert "    high: limit 8 °C (above), crossed; budget" in text
    assert "not a food-safety plan or a regulatory record" in text
    board = collect(store)
    console = Console(file=io.StringIO(), width=80, height=24, color_system=None)
    console.print(render(board, 80, 24))
    frame = console.file.getvalue()
    assert "▲ late" in frame and "└ stage-1" in frame and "└ high" in frame
    # a target's deadline with the chance of making it; a limit's allowance
    assert " by " in frame and "% chance" in frame and "allowance used up" in frame
    lines = plain_lines(board)
    assert any(ln.startswith("  stage-2 target 5 °C heading due ") for ln in lines), lines
    store.close()
