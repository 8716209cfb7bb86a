"""Episodes in the store (SQLite and, with THERMETA_TEST_PG_URL, PostgreSQL), the start/end
commands, and the record printed as CSV and JSON."""

from __future__ import annotations

import csv
import json
import math
import subprocess
import sys
import tomllib

import numpy as np
import pytest
from test_storage import store  # noqa: F401 - the fixture, run on both stores
from thermeta.daemon.clock import ManualClock
from thermeta.daemon.config import parse_config
from thermeta.daemon.ingest.writer import Activity
from thermeta.daemon.refit.rounds import Refitter
from thermeta.storage.episodes import EpisodeStore, Mark

CLI = [sys.executable, "-m", "thermeta.daemon.cli"]
T0 = 1_800_000_000.0


def test_one_open_episode_per_item_and_sides_decided_once(store):  # noqa: F811
    """Opening an episode closes the item's open one ("next"); marks from messages apply in time
    order inside a batch's transaction; a recorded side is never replaced."""
    eps = EpisodeStore(store)
    first = eps.start("tray-c", T0, "probe")
    second = eps.start("tray-c", T0 + 600, "command", "B-2", "rice")
    assert set(eps.open_episodes()) == {"tray-c"} and eps.open_episodes()["tray-c"].id == second
    closed = eps.get(first)
    assert (closed.closed_at, closed.closed_by) == (T0 + 600, "next")
    iid = store.ensure_item("wort", now=T0)
    store.write_batch(
        [(iid, T0, 50.0, 0, T0)] if store.dialect == "sqlite" else
        [dict(item_id=iid, ts=T0, value_c=50.0, flags=0, received_at=T0)],
        marks=[
            Mark("wort", T0 + 20, "end", "message"),
            Mark("wort", T0 + 10, "start", "message", "B-0418"),
        ],
    )  # fmt: skip
    (w,) = eps.of_item("wort")
    assert (w.name, w.opened_at, w.closed_at, w.closed_by) == (
        "B-0418",
        T0 + 10,
        T0 + 20,
        "message",
    )
    assert eps.end("wort", T0 + 30, "command") is None  # none open
    assert eps.decide_side("room", "limit", "above", T0, 4.2) == "above"
    assert eps.decide_side("room", "limit", "below", T0 + 1, 12.0) == "above"  # kept
    assert eps.sides("room") == {"limit": "above"}


ITEM = """
[[item]]
name = "tray-c"
topic = "k/tray-c"
schedule = "food-code-cooling"
ambient = -6.0
"""


@pytest.fixture
def record_site(tmp_path):
    """A tray cooling from 74 degC (tau 170 min, Newton's law) for 3 h 20 min, refitted every
    10 minutes: its episode opens at 57 degC, stage 1 (21 degC within 2 h: US FDA Food Code
    2022, 3-501.14, from memory) is missed."""
    text = f'[storage]\nurl = "sqlite:///{tmp_path / "s.db"}"\n[fit]\nrefit_every = 600\n{ITEM}'
    path = tmp_path / "c.toml"
    path.write_text(text)
    cfg = parse_config(tomllib.loads(text), str(path), text)
    from thermeta.storage.store import Store

    st = Store(cfg.storage.url)
    st.create_all()
    act, clock = Activity(), ManualClock(T0)
    rf = Refitter(st, cfg, clock, act)
    (item,) = cfg.items
    iid = st.ensure_item("tray-c", topic=item.topic, now=T0)
    rng = np.random.default_rng(23)
    for i in range(200):
        ts = T0 + 60.0 * i
        v = -6 + 80 * math.exp(-i / 170.0) + float(rng.normal(0, 0.05))
        st.write_batch([(iid, ts, v, 0, ts)])
        act.note("tray-c", item, ts)
        clock.set(ts)
        if i % 10 == 9:
            rf.run_once()
    st.close()
    return path


def test_start_and_end_commands(record_site):
    """`thermeta start` opens a named episode (closing the probe's), `thermeta end` closes it, a
    second end exits 1 (none open); an unknown item or a bad time exits 2."""

    def run(*args):
        return subprocess.run(CLI + list(args), capture_output=True, text=True, timeout=60)

    cfg = str(record_site)
    r = run("start", "tray-c", "--config", cfg, "--batch", "B-7", "--at", "2027-01-15T12:00:00Z")
    assert r.returncode == 0 and "tray-c: episode 2 (B-7) started" in r.stdout, r.stderr
    r = run("end", "tray-c", "--config", cfg, "--at", "2027-01-15T12:30:00Z")
    assert r.returncode == 0 and "tray-c: episode 2 ended" in r.stdout
    r = run("end", "tray-c", "--config", cfg)
    assert r.returncode == 1 and "has no open episode" in r.stderr
    assert run("start", "nobody", "--config", cfg).returncode == 2
    r = run("start", "tray-c", "--config", cfg, "--at", "noon")
    assert r.returncode == 2 and "--at: unparseable time" in r.stderr


def test_the_record_as_json_and_csv(record_site, tmp_path):
    """The episode's record: the stages (stage 1 reached late, at the true moment of Newton's
    law; stage 2 still ahead), the forecasts made along the way, each reading, the caution; the
    CSV holds the same facts a row each.  Bad requests exit 2 with the reason."""

    def report(*args):
        return subprocess.run(
            CLI + ["report", "tray-c", "--config", str(record_site), *args],
            capture_output=True,
            text=True,
            timeout=60,
        )

    out = tmp_path / "r.json"
    assert report("--episode", "1", "--out", str(out)).returncode == 0
    rec = json.loads(out.read_text())
    s1, s2 = rec["levels"]
    assert (s1["name"], s1["made"]) == ("stage-1", False)
    # T(t) = Ta + (T0 - Ta) e^(-t / tau): 21 degC at t = 170 min x ln(80 / 27)
    assert s1["first_passed_at_s"] == pytest.approx(T0 + 60 * 170 * math.log(80 / 27), abs=60)
    assert s2["made"] is None and s2["first_passed_at"] is None  # its 6 h are still running
    assert rec["episode"]["started_by"] == "probe"
    # the episode opened at 57 degC: t = 170 min x ln(80 / 63), Newton's law
    t57 = T0 + 60 * 170 * math.log(80 / 63)
    from thermeta.daemon.timefmt import parse_time

    assert parse_time(rec["since"]) == pytest.approx(t57, abs=60)
    assert rec["forecasts"] and {f["level"] for f in rec["forecasts"]} == {"stage-1", "stage-2"}
    assert len(rec["readings"]) == sum(1 for i in range(200) if T0 + 60 * i >= t57)
    assert "not a food-safety plan or a regulatory record" in rec["caution"]
    out_csv = tmp_path / "r.csv"
    assert report("--out", str(out_csv)).returncode == 0  # the newest episode by default
    rows = list(csv.reader(out_csv.open()))
    assert rows[0] == ["record", "time", "name", "value", "detail"]
    kinds = [r[0] for r in rows[1:]]
    assert kinds[0] == "caution" and "deadline" in kinds and "forecast" in kinds
    assert kinds.count("reading") == len(rec["readings"])
    for args, why in (
        (["--episode", "1", "--since", "2027-01-15T08:00:00Z", "--out", "x.json"], "not both"),
        (["--episode", "9", "--out", str(tmp_path / "x.json")], "has no episode 9"),
        (["--out", str(tmp_path / "x.txt")], "must end in .pdf, .csv, .json"),
        (["--since", "2027-01-15T09:00:00Z", "--until", "2027-01-15T08:00:00Z", "--out",
          str(tmp_path / "x.json")], "the span is empty"),
    ):  # fmt: skip
        r = report(*args)
        assert r.returncode == 2 and why in r.stderr, (args, r.stderr)
