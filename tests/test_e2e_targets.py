"""Targets, deadlines, schedules, budgets and several levels end to end: readings published to a
real Mosquitto, the real service refitting on a simulated clock, alerts received by a webhook on
loopback, the retained forecast read back from the broker.

Every load follows Newton's law of cooling, T(t) = Ta + (T0 - Ta) e^(-k t) (the published law),
so each true time is known in closed form: t(T) = ln((T0 - Ta) / (T - Ta)) / k.  The scenarios'
numbers are invented; the trade's figures are named beside each check.
"""

from __future__ import annotations

import math
import subprocess
import sys

import pytest
from e2e_site import T0, Site

pytestmark = pytest.mark.broker

MIN, H = 60.0, 3600.0


def newton(ta: float, t0: float, k: float):
    # T(t) = Ta + (T0 - Ta) e^(-k t)
    return lambda t: ta + (t0 - ta) * math.exp(-k * max(t, 0.0))


def when(ta: float, t0: float, k: float, temp: float) -> float:
    # t(T) = ln((T0 - Ta) / (T - Ta)) / k
    return math.log((t0 - ta) / (temp - ta)) / k


def events(alerts, item=None, level=None):
    return [
        (a["event"], a["level"], a["at_s"] - T0, a.get("reminder"))
        for a in alerts
        if (item is None or a["item"] == item) and (level is None or a["level"] == level)
    ]


def test_a_target_reached_is_calm_news_and_no_reminder_follows(broker, tmp_path):
    """Wort chilled toward 9 degC coolant reaches its pitching target of 20 degC (ales pitch at
    about 18-20 degC: common practice): one `reached` alert near the true moment, then nothing
    for an hour more with reminders every 5 min configured; the retained forecast shows the
    calm state `reached`, never `crossed`."""
    k = 0.06 / MIN  # a 20 hl batch through a plate chiller (the demo's figures)
    curve = newton(9.0, 97.0, k)
    t_true = when(9.0, 97.0, k, 20.0)
    items = """
[[item]]
name = "wort-7"
topic = "brew/wort-7"
threshold = 20.0
kind = "target"
side = "below"
ambient = 9.0
lead = 600
remind_every = 300
"""
    with Site(broker, tmp_path, items) as site:
        site.feed(
            "brew/wort-7",
            "wort-7",
            lambda t: curve(t) if t < t_true + 5 * MIN else 19.0,  # then held at pitching
            0,
            t_true + 65 * MIN,
            every_s=30,
            refit_every_s=120,
        )
        got = events(site.alerts(), "wort-7")
        retained = site.retained("wort-7")
    assert [e[0] for e in got] == ["reached"], got
    assert t_true <= got[0][2] <= t_true + 120 + 30  # the first refit after the true moment
    assert retained["state"] == "reached" and retained["kind"] == "target"
    assert retained["levels"][0]["state"] == "reached"


def test_a_target_that_will_be_late_is_warned_at_least_lead_before_its_deadline(broker, tmp_path):
    """Coolant at 15 degC is too warm to bring wort from 97 to 20 degC within the 30 minutes the
    brewer allows: the true time is 47 min.  The episode starts with a message on the item's
    episode topic; `late` comes at least `lead` (10 min) before the deadline, by the LATE end of
    the interval, then `missed` at the deadline, then `reached` (not made) when it gets there."""
    k = 0.06 / MIN
    curve = newton(15.0, 97.0, k)
    t_true = when(15.0, 97.0, k, 20.0)
    deadline, lead = 30 * MIN, 10 * MIN
    items = f"""
[[item]]
name = "wort-8"
topic = "brew/wort-8"
episode_topic = "brew/wort-8/episode"
threshold = 20.0
kind = "target"
side = "below"
within = {deadline:g}
ambient = 15.0
lead = {lead:g}
"""
    with Site(broker, tmp_path, items) as site:
        site.publish(
            "brew/wort-8/episode", f'{{"episode": "start", "batch": "B-0419", "ts": {T0}}}'
        )
        site.feed(
            "brew/wort-8", "wort-8", curve, 0, t_true + 10 * MIN, every_s=20, refit_every_s=60
        )
        got = events(site.alerts(), "wort-8")
        ep = site.forecast("wort-8")["episode"]
    kinds = [e[0] for e in got]
    assert "late" in kinds and "missed" in kinds and kinds[-1] == "reached", got
    first_late = next(e[2] for e in got if e[0] == "late")
    assert first_late <= deadline - lead, got
    assert next(e[2] for e in got if e[0] == "missed") == pytest.approx(deadline, abs=60)
    assert t_true <= got[-1][2] <= t_true + 60 + 20
    assert kinds.index("late") < kinds.index("missed") < kinds.index("reached")
    assert ep["batch"] == "B-0419" and ep["started_by"] == "message"
    assert _epoch(ep["tally"]["reached"]["target"]) == pytest.approx(T0 + t_true, abs=30)


def test_a_two_stage_schedule_warns_while_the_first_stage_can_be_saved(broker, tmp_path):
    """A deep tray of rice (time constant 170 min) in a blast chiller at -6 degC, against the
    food-code cooling schedule (57 to 21 degC within 2 h, to 5 degC within 6 h in total: US FDA
    Food Code 2022, 3-501.14, from memory).  The episode opens when the probe passes 57 degC.
    Stage 1 truly takes 144 min: `late` comes at least `lead` (30 min) before its deadline, while
    it could still be saved (move the tray, split it), then `missed`; stage 2 (296 min) is made.
    The record prints as a PDF, looked at as a picture and read for its content."""
    k = 1 / (170 * MIN)
    curve = newton(-6.0, 74.0, k)
    t57 = when(-6.0, 74.0, k, 57.0)
    t21, t5 = when(-6.0, 74.0, k, 21.0), when(-6.0, 74.0, k, 5.0)
    assert t21 - t57 > 2 * H and t5 - t57 < 6 * H  # the schedule's truth, from the closed form
    items = """
[[item]]
name = "tray-c"
topic = "kitchen/blast-1/tray-c"
schedule = "food-code-cooling"
ambient = -6.0
lead = 1800
"""
    with Site(broker, tmp_path, items, refit_every_s=300) as site:
        site.feed(
            "kitchen/blast-1/tray-c",
            "tray-c",
            curve,
            0,
            t5 + 20 * MIN,
            every_s=60,
            refit_every_s=300,
        )
        got = events(site.alerts(), "tray-c")
        fc = site.forecast("tray-c")
        pdf = tmp_path / "tray-c.pdf"
        r = subprocess.run(
            [
                sys.executable,
                "-m",
                "thermeta.daemon.cli",
                "report",
                "tray-c",
                "--config",
                str(site.path),
                "--out",
                str(pdf),
            ],
            capture_output=True,
            text=True,
            timeout=120,
        )
    assert r.returncode == 0, r.stderr
    stage1 = [e for e in got if e[1] == "stage-1"]
    stage2 = [e for e in got if e[1] == "stage-2"]
    deadline1 = t57 + 2 * H
    late = [e[2] for e in stage1 if e[0] == "late"]
    assert late and late[0] <= deadline1 - 1800, got
    assert [e[0] for e in stage1][-2:] == ["missed", "reached"], got
    assert next(e[2] for e in stage1 if e[0] == "missed") == pytest.approx(deadline1, abs=300)
    assert [e[0] for e in stage2][-1:] == ["reached"] and "missed" not in [e[0] for e in stage2]
    ep = fc["episode"]
    assert ep["started_by"] == "probe" and ep["ended_by"] == "done"
    assert abs(T0 + t57 - _epoch(ep["started_at"])) < 60  # interpolated between readings
    _check_pdf(pdf)


def _epoch(text: str) -> float:
    from thermeta.daemon.timefmt import parse_time

    return parse_time(text)


def _check_pdf(pdf) -> None:
    """Page 1 rendered to pixels: a real picture (the readings' line in its colour, text in
    black), and its text: the item, the stages' outcomes, the MKT line and the caution."""
    import numpy as np
    import pypdfium2 as pdfium

    doc = pdfium.PdfDocument(str(pdf))
    try:
        page = doc[0]
        img = np.asarray(page.render(scale=1.0).to_pil().convert("RGB")).astype(int)
        text = page.get_textpage().get_text_range()
        n_pages = len(doc)
    finally:
        doc.close()
    h, w, _ = img.shape
    assert w < h  # portrait A4
    ink = (img.sum(axis=2) < 200).mean()
    line = (np.abs(img - np.array([0x2F, 0x6F, 0x8F])).sum(axis=2) < 60).sum()
    assert ink > 0.002 and line > 200  # text on the page, and the readings drawn
    plot_half = (np.abs(img[h // 2 :] - np.array([0x2F, 0x6F, 0x8F])).sum(axis=2) < 60).sum()
    assert plot_half > 0.8 * line  # the picture sits in the lower half of page 1
    flat = " ".join(text.split())
    assert "thermeta record: tray-c" in flat
    assert "stage-1" in flat and "MISSED" in flat and "made" in flat
    assert "mean kinetic temperature" in flat
    assert "not a food-safety plan or a regulatory record" in flat
    assert n_pages >= 3  # the forecast history, the alerts and the readings follow


def test_a_budget_running_out_is_told_early_and_when_used_up(broker, tmp_path):
    """A medicine fridge (2-8 degC: common practice for the pharmaceutical cold chain) fails and
    warms toward 20 degC; its lot may spend 1 h in total above 8 degC.  The trip is opened with
    `thermeta start`.  `running_out` comes while most of the hour is left, `used_up` when the
    hour has passed above 8 degC (the true moment from the closed form), and the episode's
    record holds the time above 8 degC and its mean kinetic temperature."""
    k = 1 / (2 * H)
    curve = newton(20.0, 5.0, k)
    t8 = when(20.0, 5.0, k, 8.0)
    budget, lead = 1 * H, 30 * MIN
    items = f"""
[[item]]
name = "fridge-3"
topic = "pharmacy/fridge-3"
threshold = 8.0
side = "above"
budget = {budget:g}
ambient = 20.0
lead = {lead:g}
"""
    with Site(broker, tmp_path, items, refit_every_s=120) as site:
        r = subprocess.run(
            [
                sys.executable,
                "-m",
                "thermeta.daemon.cli",
                "start",
                "fridge-3",
                "--config",
                str(site.path),
                "--batch",
                "lot 4471",
                "--at",
                str(T0),
            ],
            capture_output=True,
            text=True,
            timeout=60,
        )
        assert r.returncode == 0, r.stderr
        assert "episode 1 (lot 4471) started" in r.stdout
        site.feed(
            "pharmacy/fridge-3",
            "fridge-3",
            curve,
            0,
            t8 + budget + 10 * MIN,
            every_s=60,
            refit_every_s=120,
        )
        got = events(site.alerts(), "fridge-3")
        fc = site.forecast("fridge-3")
    kinds = [e[0] for e in got]
    assert "crossed" in kinds and "running_out" in kinds and "used_up" in kinds, got
    t_out = next(e[2] for e in got if e[0] == "running_out")
    t_used = next(e[2] for e in got if e[0] == "used_up")
    assert t_out <= t8 + budget - lead  # told with at least lead to go
    assert t8 + budget <= t_used <= t8 + budget + 120 + 60
    tally = fc["episode"]["tally"]
    beyond = tally["beyond"]["limit"]["beyond_s"]
    assert beyond == pytest.approx(_epoch(tally["until"]) - T0 - t8, abs=60)
    assert fc["levels"][0]["budget"]["state"] == "used_up"
    assert fc["episode"]["tally"]["mkt"] is not None


def test_two_levels_on_one_probe_each_warn_in_their_turn(broker, tmp_path):
    """A cold room's air probe with a warning level at 6 degC and an action level at 8 degC: one
    item, one stored series, one forecast JSON carrying both levels; each level approaches and
    crosses in its turn, and every alert names its level."""
    k = 1 / (1.5 * H)
    curve = newton(16.0, 3.0, k)
    t6, t8 = when(16.0, 3.0, k, 6.0), when(16.0, 3.0, k, 8.0)
    items = """
[[item]]
name = "cold-room-2"
topic = "dairy/cold-room-2/air"
ambient = 16.0
lead = 900

[[item.level]]
name = "warning"
threshold = 6.0
side = "above"

[[item.level]]
name = "action"
threshold = 8.0
side = "above"
lead = 1800
"""
    with Site(broker, tmp_path, items, refit_every_s=120) as site:
        site.feed(
            "dairy/cold-room-2/air",
            "cold-room-2",
            curve,
            0,
            t8 + 20 * MIN,
            every_s=60,
            refit_every_s=120,
        )
        got = events(site.alerts(), "cold-room-2")
        fc = site.retained("cold-room-2")
        readings = len(site.svc.store.recent_readings("cold-room-2"))
        items_stored = site.svc.store.counts()["items"]
    warning = [(e[0], e[2]) for e in got if e[1] == "warning" and not e[3]]
    action = [(e[0], e[2]) for e in got if e[1] == "action" and not e[3]]
    assert [e for e, _ in warning] == ["approaching", "crossed"], got
    assert [e for e, _ in action] == ["approaching", "crossed"], got
    assert warning[0][1] <= t6 - 900 and action[0][1] <= t8 - 1800  # each at least its lead
    assert t6 <= warning[1][1] <= t6 + 180 and t8 <= action[1][1] <= t8 + 180
    assert [d["name"] for d in fc["levels"]] == ["warning", "action"]
    assert {d["state"] for d in fc["levels"]} == {"crossed"}
    assert items_stored == 1 and readings == site.sent["cold-room-2"]
