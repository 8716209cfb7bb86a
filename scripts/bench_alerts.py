#!/usr/bin/env python3
"""Alerting figures (issue 6, section 2): lead time, missed crossings and false alerts.

Long simulated traces of a cold room (an air probe and a load probe that follows the air) are
replayed through the daemon's own pure logic, refit by refit: ``predictors.forecast`` on the
item's sliding window (as the refitter calls it), ``daemon.refit.judging.judge_item`` for the
states, and ``daemon.alerts.rules.step`` for the alerts.  No broker, no store, no clock: time is
passed in.

    python scripts/bench_alerts.py                 # about 3-5 minutes on one core
    python scripts/bench_alerts.py --quick         # a smoke run

Traces, with ranges fixed before any result was seen:
- normal: compressor cycling (air sawtooth low..high, 15-40 min period) with defrost cycles
  (every 6-8 h the coil heats for 20-30 min and the room air rises by about 2-4 degC, common
  practice; it stays below the threshold); 7 days each; any alert is false;
- door left open, power failure, failing unit: 2 h of normal cycling, then the event, until the
  load's true crossing of 8 degC plus 1 h;
- busy: the normal room with brief door openings (open 1-3 min every 30-120 min, the air up by
  3-6 degC, back with a 5-10 min time constant), its air probe replayed without and with an alarm
  delay of 15 min; the approaching, crossed and regime alerts are counted.
Figures: lead time of the first ``approaching`` before the true crossing (median and 5th
percentile; the item's ``lead`` is 45 min), crossings with no ``approaching`` before them,
crossings with no ``crossed`` alert within 15 min, false alerts per item-week (an alert is false
when the noise-free curve stays below the threshold from 15 min before it to 2 x lead after it).
"""

from __future__ import annotations

import argparse
import math
import multiprocessing as mp
import os
import sys
import time
from pathlib import Path

import numpy as np
from thermeta.daemon.alerts.rules import ItemAlertState, RuleParams, step
from thermeta.daemon.config import ItemConfig
from thermeta.daemon.ingest.defrost import defrost_status
from thermeta.daemon.levels.spec import auto_side, levels_of
from thermeta.daemon.refit.judging import judge_item
from thermeta.daemon.refit.rounds import DEFROST_LOOKBACK_S, forecast_kwargs
from thermeta.daemon.simulation import synth
from thermeta.daemon.simulation.physics import first_crossing, thermostat_pieces, two_stage
from thermeta.daemon.simulation.synth import Corruption
from thermeta.predictors import forecast

sys.path.insert(0, str(Path(__file__).resolve().parent))
from readme_block import update_readme  # noqa: E402 - the scripts folder, put on the path above

MIN = 60.0
H = 3600.0
DAY = 24 * H

# ---------------------------------------------------------------------------------------------
# Parameters, fixed up front.  (lo, hi) = uniform draw.
# ---------------------------------------------------------------------------------------------
ROOM = dict(
    mid=(2.5, 4.5),
    half_swing=1.5,
    period_s=(15 * MIN, 40 * MIN),
    warm=(12.0, 25.0),
    coil=(-12.0, -4.0),
    load_tau_s=(3 * H, 8 * H),
    load_offset=(-0.5, 0.5),
    defrost_every_s=(6 * H, 8 * H),
    defrost_s=(20 * MIN, 30 * MIN),
    defrost_drive=(8.0, 12.0),
    defrost_tau_s=(40 * MIN, 60 * MIN),
    noise=(0.05, 0.1),
    spike_frac=0.005,
    spike_size=12.0,
    dt_s=60.0,
    threshold=8.0,
)
EVENTS = {
    # the door stands open: the air heads for the kitchen's air, the compressor cannot hold it
    "door": dict(drive=(15.0, 22.0), air_tau_s=(5 * MIN, 15 * MIN)),
    # the power fails: the air heads for the surroundings
    "power": dict(drive=(20.0, 32.0), air_tau_s=(30 * MIN, 2 * H)),
    # the unit fails slowly: it holds the air only near 10-14 degC
    "failing": dict(drive=(10.0, 14.0), air_tau_s=(2 * H, 4 * H)),
}
RULES = dict(
    lead_s=45 * MIN,
    hysteresis=0.5,
    hold_s=5 * MIN,
    remind_every_s=30 * MIN,
    silence_s=15 * MIN,
    horizon_s=DAY,
    window_s=2 * H,
    min_points=8,
)
REFIT_NORMAL_S = 5 * MIN  # refit interval on the week-long normal traces
REFIT_EVENT_S = 2 * MIN  # and on the event traces (the daemon's default is 30 s)
NORMAL_DAYS = 7.0
PRE_EVENT_S = 2 * H
AFTER_CROSSING_S = 1 * H
LATE_CROSSED_S = 15 * MIN
# A busy walk-in: the normal room, and on top of its air brief door openings (the kitchen's air
# pushes the probe up while the door stands open, then the coil pulls it back).  Fixed before the
# alarm delay was built, as the room above.
BUSY = dict(
    every_s=(30 * MIN, 120 * MIN),
    open_s=(1 * MIN, 3 * MIN),
    rise=(3.0, 6.0),
    back_tau_s=(5 * MIN, 10 * MIN),
)
BUSY_DELAY_S = 15 * MIN  # the air probe's alarm delay on the busy traces (common practice)
CASES = {"normal": 5, "busy": 5, "door": 20, "power": 20, "failing": 20}
QUICK_CASES = {"normal": 1, "busy": 1, "door": 1, "power": 1, "failing": 1}
QUICK_NORMAL_DAYS = 0.5
TARGET_LEAD_FRAC = 0.8  # lead time at the 5th percentile >= 80 % of lead (door and power)


def draw(spec: dict, rng: np.random.Generator) -> dict:
    return {k: float(rng.uniform(*v)) if isinstance(v, tuple) else v for k, v in spec.items()}


def sawtooth_k(p: dict) -> float:
    """One k for both phases giving the drawn period:
    off: ln((W - low)/(W - high))/k,  on: ln((high - C)/(low - C))/k."""
    low, high = p["mid"] - p["half_swing"], p["mid"] + p["half_swing"]
    logs = math.log((p["warm"] - low) / (p["warm"] - high)) + math.log(
        (high - p["coil"]) / (low - p["coil"])
    )
    return logs / p["period_s"]


def room_pieces(
    p: dict, end_s: float, rng: np.random.Generator
) -> list[tuple[float, float, float]]:
    """Thermostat cycling with defrost cycles up to ``end_s`` (pieces of a piecewise drive)."""
    k = sawtooth_k(p)
    low, high = p["mid"] - p["half_swing"], p["mid"] + p["half_swing"]
    pieces: list[tuple[float, float, float]] = []
    t, air = 0.0, p["mid"]
    next_defrost = rng.uniform(0.0, p["defrost_every_s"])
    while t < end_s:
        seg_end = min(next_defrost, end_s)
        seg = thermostat_pieces(
            seg_end, air, low, high, cold=(p["coil"], k), warm=(p["warm"], k), t0_s=t
        )
        pieces += [q for q in seg if q[0] < seg_end] or [(t, p["warm"], k)]
        if seg_end >= end_s:
            break
        pieces.append((seg_end, p["defrost_drive"], 1.0 / p["defrost_tau_s"]))
        t = seg_end + p["defrost_s"]
        air = float(two_stage(np.array([t]), pieces, p["mid"])[0][0])
        next_defrost = t + p["defrost_every_s"]
    return pieces


def defrost_signal(
    pieces: list[tuple[float, float, float]],
    p: dict,
    cut_s: float | None = None,
    off_at_cut: bool = True,
) -> list[tuple[float, float]]:
    """The controller's defrost signal (trace seconds, 1 on / 0 off) for the defrosts in ``pieces``:
    on at each start, off when its timer ends it.  A defrost cut by an event at ``cut_s`` still
    ends by the timer unless ``off_at_cut`` is False (a power failure: the controller falls
    silent, no off ever arrives)."""
    out: list[tuple[float, float]] = []
    for t0, drive, k in pieces:
        if drive != p["defrost_drive"] or k != 1.0 / p["defrost_tau_s"]:
            continue
        out.append((t0, 1.0))
        end = t0 + p["defrost_s"]
        if cut_s is None or end <= cut_s or off_at_cut:
            out.append((end, 0.0))
    return out


def readings(rng: np.random.Generator, curve, duration_s: float, p: dict, spikes: bool = True):
    c = Corruption(
        noise=p["noise"],
        quantum=0.1,
        irregular=0.05,
        spike_frac=p["spike_frac"] if spikes else 0.0,
        spike_size=p["spike_size"],
    )
    x = synth.sample_times(rng, duration_s, p["dt_s"], c)
    x, y, _, _ = synth.corrupt(rng, x, curve(x), c)
    o = np.argsort(x, kind="stable")
    return x[o], y[o]


DEFROST_SIGNAL = True  # --no-defrost-signal: the probes are not told of defrosts (for comparison)


def item_cfgs(thr: float) -> tuple[ItemConfig, ItemConfig]:
    common = dict(
        threshold=thr,
        lead_s=RULES["lead_s"],
        hysteresis=RULES["hysteresis"],
        hold_s=RULES["hold_s"],
        remind_every_s=RULES["remind_every_s"],
        silence_s=RULES["silence_s"],
        horizon_s=RULES["horizon_s"],
        window_s=RULES["window_s"],
        min_points=RULES["min_points"],
    )
    # the room's controller publishes its defrost on/off; both probes are told (the defaults of
    # defrost_recovery and defrost_max)
    common["defrost_topic"] = "room/defrost" if DEFROST_SIGNAL else None
    air = ItemConfig(name="room/air", topic="room/air", **common)
    load = ItemConfig(name="room/load", topic="room/load", ambient_topic="room/air", **common)
    return air, load


def replay(
    t: np.ndarray,
    y: np.ndarray,
    cfg: ItemConfig,
    times: np.ndarray,
    air: tuple[np.ndarray, np.ndarray] | None = None,
    defrost: list[tuple[float, float]] = (),
    levels: tuple[str, ...] = ("approaching", "crossed"),
) -> list[tuple[float, str]]:
    """The alerts (time, level) of ``levels`` one item raises over the refit instants ``times``
    (reminders left out); ``defrost`` is the controller's signal (epoch seconds, 1|0), read as
    daemon/refit/rounds.py reads the stored one."""
    st, params = ItemAlertState(), RuleParams.of(cfg)
    out: list[tuple[float, str]] = []
    w = cfg.window_s
    (level,) = levels_of(cfg)
    side = auto_side(level, float(y[0]))  # the refitter's rule: decided once, when first judged
    for now in times:
        lo, hi = np.searchsorted(t, now - w, "right"), np.searchsorted(t, now, "right")
        if hi == 0:
            continue
        tw, yw = t[lo:hi], y[lo:hi]
        kw = {}
        if air is not None:
            alo, ahi = (
                np.searchsorted(air[0], now - w, "right"),
                np.searchsorted(air[0], now, "right"),
            )
            kw = dict(ambient_t=air[0][alo:ahi], ambient_y=air[1][alo:ahi])
        # with the refit's own arguments (no learned prior: each trace is a new item)
        fc = forecast(tw, yw, level.threshold_c, **dict(forecast_kwargs(cfg, side), **kw))
        _state, body = judge_item(
            cfg.name, cfg, (level,), [fc], {level.name: side}, float(now), float(tw[-1])
        )
        if cfg.defrost_topic:
            since = now - cfg.defrost_max_s - cfg.defrost_recovery_s - DEFROST_LOOKBACK_S
            body["defrost"] = defrost_status([r for r in defrost if since <= r[0] <= now])
        for ev in step(st, body, params, float(now)):
            if ev.event in levels and not ev.reminder:
                out.append((float(now), ev.event))
    return out


def n_false(alerts: list[tuple[float, str]], curve, thr: float) -> int:
    """Alerts with no true crossing near them: the noise-free curve stays below the (upper)
    threshold from 15 min before the alert to 2 x lead after it."""
    count = 0
    for t_abs, _ in alerts:
        x = t_abs - synth.T_START
        grid = np.arange(x - 15 * MIN, x + 2 * RULES["lead_s"], 30.0)
        if float(np.max(curve(grid))) < thr:
            count += 1
    return count


def run_normal(index: int, seed: int, days: float) -> dict:
    rng = np.random.default_rng([seed, 0, index])
    p = draw(ROOM, rng)
    dur = days * DAY
    pieces = room_pieces(p, dur + H, rng)
    kl = 1.0 / p["load_tau_s"]
    load0 = p["mid"] + p["load_offset"]

    def air_curve(x):
        return two_stage(np.asarray(x, float), pieces, p["mid"])[0]

    def load_curve(x):
        return two_stage(np.asarray(x, float), pieces, p["mid"], load0, kl)[1]

    ta, ya = readings(rng, air_curve, dur, p)
    tl, yl = readings(rng, load_curve, dur, p)
    ta, tl = ta + synth.T_START, tl + synth.T_START
    air_cfg, load_cfg = item_cfgs(p["threshold"])
    times = synth.T_START + np.arange(RULES["window_s"], dur + 1, REFIT_NORMAL_S)
    sig = [(t0 + synth.T_START, v) for t0, v in defrost_signal(pieces, p)]
    a_alerts = replay(ta, ya, air_cfg, times, defrost=sig)
    l_alerts = replay(tl, yl, load_cfg, times, air=(ta, ya), defrost=sig)
    fa, fl = (
        n_false(a_alerts, air_curve, p["threshold"]),
        n_false(l_alerts, load_curve, p["threshold"]),
    )
    weeks = (dur - RULES["window_s"]) / (7 * DAY)
    return {
        "kind": "normal",
        "item_weeks": 2 * weeks,
        "false": fa + fl,
        "false_air": fa,
        "false_load": fl,
        "alerts": len(a_alerts) + len(l_alerts),
    }


def run_busy(index: int, seed: int, days: float) -> dict:
    """A busy walk-in's air probe, replayed without and with the alarm delay; counts the
    approaching, crossed and regime alerts of each (the openings that pass the threshold are
    real excursions of the air, so no alert here is 'false' by n_false's rule)."""

    rng = np.random.default_rng([seed, 9, index])
    p = draw(ROOM, rng)
    dur = days * DAY
    pieces = room_pieces(p, dur + H, rng)
    opens = []
    t = rng.uniform(0.0, BUSY["every_s"][1])
    while t < dur:
        opens.append(
            (
                t,
                rng.uniform(*BUSY["open_s"]),
                rng.uniform(*BUSY["rise"]),
                rng.uniform(*BUSY["back_tau_s"]),
            )
        )
        t += rng.uniform(*BUSY["every_s"])

    def air_curve(x):
        x = np.asarray(x, float)
        out = two_stage(x, pieces, p["mid"])[0].copy()
        for t0, open_s, rise, back_tau in opens:
            since = x - t0
            up = np.clip(since / open_s, 0.0, 1.0) * rise
            out += np.where(
                since >= 0,
                up * np.where(since > open_s, np.exp(-(since - open_s) / back_tau), 1.0),
                0.0,
            )
        return out

    ta, ya = readings(rng, air_curve, dur, p)
    ta = ta + synth.T_START
    air_cfg, _ = item_cfgs(p["threshold"])
    times = synth.T_START + np.arange(RULES["window_s"], dur + 1, REFIT_NORMAL_S)
    sig = [(t0 + synth.T_START, v) for t0, v in defrost_signal(pieces, p)]
    levels = ("approaching", "crossed", "regime")
    out = {
        "kind": "busy",
        "air_weeks": (dur - RULES["window_s"]) / (7 * DAY),
        "openings": len(opens),
        "past": sum(
            float(np.max(air_curve(np.arange(t0, t0 + o + 3 * bt, 30.0)))) >= p["threshold"]
            for t0, o, _, bt in opens
        ),
    }
    for tag, delay in (("plain", 0.0), ("delayed", BUSY_DELAY_S)):
        cfg = air_cfg.model_copy(update={"delay_s": delay})
        got = replay(ta, ya, cfg, times, defrost=sig, levels=levels)
        out[tag] = {lv: sum(1 for _, x in got if x == lv) for lv in levels}
    return out


def run_event(kind: str, index: int, seed: int) -> dict:
    rng = np.random.default_rng([seed, 1 + list(EVENTS).index(kind), index])
    p = draw(ROOM, rng)
    e = draw(EVENTS[kind], rng)
    event_s = PRE_EVENT_S + RULES["window_s"]
    pieces = [q for q in room_pieces(p, event_s, rng) if q[0] < event_s]
    pieces.append((event_s, e["drive"], 1.0 / e["air_tau_s"]))
    kl = 1.0 / p["load_tau_s"]
    load0 = p["mid"] + p["load_offset"]

    def load_curve(x):
        return two_stage(np.asarray(x, float), pieces, p["mid"], load0, kl)[1]

    cross = first_crossing(load_curve, p["threshold"], "rising", event_s, event_s + 5 * DAY, 10.0)
    if cross is None:
        return {"kind": kind, "skipped": "the load never crosses"}
    dur = cross + AFTER_CROSSING_S
    ta, ya = readings(rng, lambda x: two_stage(x, pieces, p["mid"])[0], dur, p)
    tl, yl = readings(rng, load_curve, dur, p)
    ta, tl = ta + synth.T_START, tl + synth.T_START
    _, load_cfg = item_cfgs(p["threshold"])
    times = synth.T_START + np.arange(RULES["window_s"], dur + 1, REFIT_EVENT_S)
    # a power failure silences the controller too: a defrost it cut never reports its end
    sig = [
        (t0 + synth.T_START, v)
        for t0, v in defrost_signal(pieces, p, event_s, off_at_cut=kind != "power")
    ]
    alerts = replay(tl, yl, load_cfg, times, air=(ta, ya), defrost=sig)
    t_event, t_cross = synth.T_START + event_s, synth.T_START + cross
    before = [a for a in alerts if a[0] < t_event]
    false_before = n_false(before, load_curve, p["threshold"])
    appr = [a[0] for a in alerts if a[1] == "approaching" and t_event <= a[0] <= t_cross]
    crossed = [a[0] for a in alerts if a[1] == "crossed" and a[0] >= t_event]
    return {
        "kind": kind,
        "lead_s": (t_cross - appr[0]) if appr else None,
        "warned": bool(appr),
        "crossed_in_time": bool(crossed) and crossed[0] <= t_cross + LATE_CROSSED_S,
        "false": false_before,
        "item_weeks": (event_s - RULES["window_s"]) / (7 * DAY),
        "event_to_cross_s": cross - event_s,
    }


def run_unit(u: tuple[str, int, int, float]) -> dict:
    kind, index, seed, days = u
    if kind == "normal":
        return run_normal(index, seed, days)
    if kind == "busy":
        return run_busy(index, seed, days)
    return run_event(kind, index, seed)


def table(results: list[dict]) -> list[str]:
    lead = RULES["lead_s"]
    lines = [
        "| traces | n | time from event to crossing (median) | lead of first approaching, "
        "median / 5th pct | no approaching before the crossing | no crossed alert within 15 min | "
        f"5th pct >= {TARGET_LEAD_FRAC:.0%} of lead |",
        "|---|---|---|---|---|---|---|",
    ]
    for kind in EVENTS:
        rs = [r for r in results if r["kind"] == kind and "skipped" not in r]
        if not rs:
            continue
        leads = np.array([r["lead_s"] if r["lead_s"] is not None else 0.0 for r in rs])
        med, p5 = float(np.median(leads)), float(np.percentile(leads, 5))
        to_cross = float(np.median([r["event_to_cross_s"] for r in rs]))
        verdict = (
            "-" if kind == "failing" else ("PASS" if p5 >= TARGET_LEAD_FRAC * lead else "FAIL")
        )
        lines.append(
            f"| {kind} | {len(rs)} | {to_cross / MIN:.0f} min | "
            f"{med / MIN:.0f} / {p5 / MIN:.0f} min | "
            f"{sum(not r['warned'] for r in rs)} | {sum(not r['crossed_in_time'] for r in rs)} | "
            f"{verdict} |"
        )
    weeks = sum(r["item_weeks"] for r in results if "item_weeks" in r)
    false = sum(r["false"] for r in results if "false" in r)
    normal = [r for r in results if r["kind"] == "normal"]
    n_weeks = sum(r["item_weeks"] for r in normal)
    n_false = sum(r["false"] for r in normal)
    n_air = sum(r["false_air"] for r in normal)
    month_verdict = (
        "PASS"
        if n_false == 0 and n_weeks >= 30 / 7
        else ("FAIL" if n_false else "n/a (under a month)")
    )
    lines += [
        "",
        "| no-event time | item-weeks | false alerts (air / load probes) | per item-week | "
        "zero over >= 1 item-month |",
        "|---|---|---|---|---|",
        f"| normal cycling with defrost (air and load probes) | {n_weeks:.1f} | "
        f"{n_false} ({n_air} / {n_false - n_air}) | "
        f"{n_false / n_weeks if n_weeks else math.nan:.2f} | "
        f"{month_verdict} |",
        "| all no-event time (normal traces, and the 2 h before each event) | "
        f"{weeks:.1f} | {false} | "
        f"{false / weeks if weeks else math.nan:.2f} | |",
    ]
    busy = [r for r in results if r["kind"] == "busy"]
    if busy:

        def counts(tag):
            return " / ".join(
                str(sum(r[tag][lv] for r in busy)) for lv in ("approaching", "crossed", "regime")
            )

        lines += [
            "",
            "| busy walk-in, air probe (door open 1-3 min every 30-120 min) | item-weeks | "
            "openings (air past the threshold) | alerts approaching / crossed / regime, no "
            f"delay | with delay = {BUSY_DELAY_S / MIN:.0f} min |",
            "|---|---|---|---|---|",
            f"| {len(busy)} trace{'' if len(busy) == 1 else 's'} | "
            f"{sum(r['air_weeks'] for r in busy):.1f} | "
            f"{sum(r['openings'] for r in busy)} ({sum(r['past'] for r in busy)}) | "
            f"{counts('plain')} | {counts('delayed')} |",
        ]
    return lines


README_BEGIN = "<!-- bench_alerts: begin (written by scripts/bench_alerts.py --readme) -->"
README_END = "<!-- bench_alerts: end -->"


def run_all(cases: dict, days: float, seed: int, jobs: int = 1) -> tuple[list[dict], float]:
    """Every trace; returns one result per trace and the seconds it took."""
    units = [(k, i, seed, days) for k, n in cases.items() for i in range(n)]
    t0 = time.perf_counter()
    if jobs > 1:
        with mp.get_context("fork").Pool(jobs) as pool:
            results = pool.map(run_unit, units, chunksize=1)
    else:
        results = [run_unit(u) for u in units]
    return results, time.perf_counter() - t0


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true")
    ap.add_argument("--seed", type=int, default=2026)
    ap.add_argument(
        "--jobs",
        type=int,
        default=os.cpu_count() or 1,
        help="worker processes (default: one per CPU)",
    )
    ap.add_argument(
        "--no-defrost-signal",
        action="store_true",
        help="do not tell the probes of the controller's defrosts (shows what it buys)",
    )
    ap.add_argument(
        "--readme",
        action="store_true",
        help="also rewrite the alerting table in README.md (between the bench's markers)",
    )
    ap.add_argument("--out", default=str(Path(__file__).resolve().parent.parent / "docs"))
    args = ap.parse_args(argv)
    if args.jobs < 1:
        ap.exit(2, "bench_alerts: --jobs must be >= 1\n")
    global DEFROST_SIGNAL
    DEFROST_SIGNAL = not args.no_defrost_signal
    cases = QUICK_CASES if args.quick else CASES
    days = QUICK_NORMAL_DAYS if args.quick else NORMAL_DAYS
    results, elapsed = run_all(cases, days, args.seed, args.jobs)
    cmd = (
        "python scripts/bench_alerts.py " + " ".join(argv if argv is not None else sys.argv[1:])
    ).strip()
    text = "\n".join(
        [
            "# Alerting bench",
            "",
            f"Produced by `{cmd}` ({elapsed:.0f} s, seed {args.seed}). Rules: lead 45 min, "
            "hysteresis 0.5 degC, hold 5 min, horizon 24 h, window 2 h; refits every "
            f"{REFIT_EVENT_S / MIN:g} min on event traces and "
            f"{REFIT_NORMAL_S / MIN:g} min on normal traces; "
            "threshold 8 degC; the load probe is fitted with the air probe as measured ambient; "
            + (
                "both probes get the controller's defrost signal (on at each defrost's start, off "
                "at its end; none after a power failure) and hold new alerts through a defrost and "
                "30 min after it (at most 60 min + 30 min)."
                if DEFROST_SIGNAL
                else "no defrost signal is given (`--no-defrost-signal`)."
            ),
            "",
            "Forecasts support decisions; they are not a food-safety plan or a regulatory record.",
            "",
            *table(results),
            "",
        ]
    )
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    (out / "bench_alerts.md").write_text(text)
    if args.readme:
        err = update_readme(
            Path(__file__).resolve().parent.parent / "README.md",
            "\n".join(
                [
                    README_BEGIN,
                    f"Measured by `{cmd}` ({elapsed:.0f} s, seed "
                    f"{args.seed}; lead 45 min, threshold 8 degC):",
                    "",
                    *table(results),
                    README_END,
                ]
            ),
            README_BEGIN,
            README_END,
        )
        if err:
            print(f"bench_alerts: {err}", file=sys.stderr)
    print(text)
    print(f"wrote {out / 'bench_alerts.md'}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
