"""Listening to a service that plays a scenario: every forecast and alert recorded, told as
lines, and summed up against the scenario's truth (``thermeta demo``)."""

from __future__ import annotations

import json
import logging
import math
import threading
from typing import Any

import paho.mqtt.client as mqtt
from thermeta.daemon.levels.judge import remaining_s
from thermeta.daemon.refit.rounds import ForecastUpdate
from thermeta.daemon.simulation.physics import first_crossing
from thermeta.daemon.states import ItemState
from thermeta.daemon.timefmt import clock, duration, local_clock, parse_time, span
from thermeta.daemon.units import UNIT_SIGN

HORIZON_S = 86400.0  # forecasts further out than the items' horizon are not counted as ahead
PAST = (ItemState.CROSSED, ItemState.REACHED, ItemState.MISSED)


class Recorder:
    """Collects every forecast (listener of the service) and every alert (MQTT), prints lines."""

    def __init__(self, scenario: Any, clock: Any, out: Any, echo: bool):
        self.scenario, self.clock, self.out, self.echo = scenario, clock, out, echo
        self.truth = {p.name: p for p in scenario.loads}
        self.forecasts: dict[str, list[dict[str, Any]]] = {}
        self.alerts: list[dict[str, Any]] = []
        self._last_print: dict[str, tuple[str, float]] = {}
        self._lock = threading.Lock()
        self._print_lock = threading.Lock()

    def on_forecast(self, update: ForecastUpdate) -> None:
        item_cfg, body = update.item, update.body
        now = self.clock.now()
        # the level the simulated truth is about: the one at the probe's threshold
        truth = self.truth.get(item_cfg.name)
        thr = None if truth is None else truth.spec.threshold
        level = next(
            (d for d in body.get("levels") or [] if thr is not None and d.get("threshold") == thr),
            None,
        )
        made = _epoch(body.get("updated_at")) or now
        if level is not None:  # a level's ETAs count from when the forecast was made
            etas = {k: level.get(k) for k in ("eta_s", "eta_lo_s", "eta_hi_s")}
        else:
            etas = {k: remaining_s(body, k, made) for k in ("eta_s", "eta_lo_s", "eta_hi_s")}
        t_last = _epoch(body.get("last_reading_at"))
        rec = {
            "made_at": made,
            "state": body.get("state"),
            "level_state": None if level is None else level.get("state"),
            # the judgement of this forecast itself, before the alert rules held a warning
            "judged": None if level is None else level.get("judged") or level.get("state"),
            **etas,
            "t_last": t_last,
            "value_now": body.get("value_now"),
            "held_crossing_t": self.held_crossing(truth, t_last),
        }
        with self._lock:
            self.forecasts.setdefault(item_cfg.name, []).append(rec)
            state_then, printed_at = self._last_print.get(item_cfg.name, ("", -math.inf))
            due = rec["state"] != state_then or now - printed_at >= 1800.0
            if due:
                self._last_print[item_cfg.name] = (rec["state"], now)
        if due and self.echo:
            self._print(self._forecast_line(item_cfg, body, now))

    def held_crossing(self, truth: Any, t_last: float | None) -> float | None:
        """When the probe would cross had its surroundings kept the course they had at
        ``t_last`` (what a forecast made from readings up to then can know); the true crossing
        when no later event changes it."""
        if truth is None or truth.spec.threshold is None or truth.spec.direction is None:
            return None
        held = truth.spec.held
        if held is None or t_last is None:
            return truth.crossing_t_true
        s = t_last - self.scenario.t_start
        c = first_crossing(
            held(s), truth.spec.threshold, truth.spec.direction, s, s + HORIZON_S, 30.0
        )
        return None if c is None else self.scenario.t_start + c

    def _forecast_line(self, item_cfg: Any, d: dict[str, Any], now: float) -> str:
        unit = UNIT_SIGN.get(item_cfg.unit, item_cfg.unit)
        parts = [f"{self._stamp(now)} forecast {item_cfg.name}: {d.get('state')}"]
        if d.get("value_now") is not None:
            parts.append(f"now {d['value_now']:.1f} {unit}")
        eta = d.get("eta_s")
        t_last = _epoch(d.get("last_reading_at"))
        horizon = getattr(item_cfg, "horizon_s", HORIZON_S)
        if eta and eta > horizon and d.get("state") != ItemState.CROSSED:
            # beyond the horizon a forecast's time is not one to act on (nor is it shown so)
            parts.append(f"no crossing within {duration(horizon)}")
        elif eta and t_last is not None and d.get("state") != ItemState.CROSSED:
            # the forecast counts from its newest reading; the line counts from now
            ahead = t_last - now
            lo, hi = d.get("eta_lo_s"), d.get("eta_hi_s")
            band = span(
                None if lo is None else max(0.0, lo + ahead),
                None if hi is None or hi > 30 * 86400 else max(0.0, hi + ahead),
            )
            verb = "reaches" if d.get("kind") == "target" else "crosses"
            parts.append(
                f"{verb} {d.get('threshold'):g} {unit} at {clock(t_last + eta, now)} "
                f"(in {duration(t_last + eta - now)}; 90 %: {band})"
            )
        elif d.get("state") == ItemState.STEADY and d.get("eta_lo_s") is not None:
            # the best fit never crosses, but curves the readings allow do: say from when
            lo = d["eta_lo_s"] + (t_last - now if t_last is not None else 0.0)
            parts.append(f"no estimate yet; could cross in {duration(max(0.0, lo))} or later")
        elif d.get("state") == ItemState.STEADY:
            parts.append("no crossing ahead")
        kept = [
            lv
            for lv in d.get("levels") or []
            if lv.get("judged") and lv.get("judged") != lv.get("state")
        ]
        if kept:
            # the alert rules keep a raised warning until it has eased: say so, or the line
            # reads "approaching" beside no crossing at all
            parts.append(f"warning kept until it eases (this forecast alone: {kept[0]['judged']})")
        truth = self.truth.get(item_cfg.name)
        if truth is not None and d.get("state") in (ItemState.APPROACHING, ItemState.STEADY):
            c = truth.crossing_t_true
            text = (
                "never crosses"
                if c is None
                else f"crosses at {local_clock(c)}"
                if c > now
                else "already crossed"
            )
            held = self.held_crossing(truth, t_last)
            if held != c and (c is None or c > now):
                # a later event (a door closed) changes the course the forecast could see
                text += "; as things stand " + (
                    f"it would cross at {local_clock(held)}" if held else "it would not cross"
                )
            parts.append("truth: " + text)
        return "; ".join(parts)

    def on_alert(self, topic: str, payload: bytes) -> None:
        try:
            doc = json.loads(payload)
        except ValueError:
            doc = {"text": payload.decode("utf-8", "replace")}
        if not isinstance(doc, dict):
            doc = {"text": str(doc)}
        item = doc.get("item") or topic.rsplit("/", 1)[-1]
        now = self.clock.now()
        with self._lock:
            self.alerts.append(
                {"at": now, "topic": topic, "item": item, "event": doc.get("event"), "body": doc}
            )
        if self.echo:
            text = doc.get("sentence") or doc.get("text") or doc.get("message") or json.dumps(doc)
            self._print(f"{self._stamp(now)} ALERT {doc.get('event') or ''} {item}: {text}")

    def _stamp(self, now: float) -> str:
        return f"[{local_clock(now)} +{(now - self.scenario.t_start) / 60:5.0f} min]"

    def _print(self, line: str) -> None:
        # forecasts (the refit thread) and alerts (the MQTT thread) print: one write per line
        try:
            with self._print_lock:
                self.out.write(line + "\n")
                self.out.flush()
        except BrokenPipeError:  # the reader went away (e.g. `| head`): stop printing
            self.echo = False

    def _events_of(self, name: str) -> list[float]:
        """When the surroundings of ``name``'s site changed (epoch s, the scenario's events)."""
        return [
            t
            for t, text in getattr(self.scenario, "events", [])
            if name.startswith(text.split(":", 1)[0] + "/")
        ]

    def summary(self) -> dict[str, Any]:
        """Per item: how the forecasts made ahead of the true crossing compare with it."""
        items = {}
        for name, p in self.truth.items():
            fcs = self.forecasts.get(name, [])
            c = p.crossing_t_true
            errors = []
            for f in fcs:
                # made while a crossing was forecast within the horizon and not yet come
                if (
                    c is None
                    or f["eta_s"] is None
                    or f["eta_s"] > HORIZON_S
                    or f["level_state"] in PAST
                    or f["state"] in (ItemState.STALE, ItemState.LEARNING)
                ):
                    continue
                true_left = c - f["made_at"]
                if true_left <= 0:
                    continue
                errors.append(
                    {
                        "made_at": f["made_at"],
                        "true_eta_s": true_left,
                        "eta_s": f["eta_s"],
                        "rel_error": (f["eta_s"] - true_left) / true_left,
                        "inside_90": (f["eta_lo_s"] is None or f["eta_lo_s"] <= true_left)
                        and (f["eta_hi_s"] is None or true_left <= f["eta_hi_s"]),
                    }
                )
            events = self._events_of(name)
            held_errors, false_warnings = [], []
            for f in fcs:
                if f.get("judged") != ItemState.APPROACHING or f["t_last"] is None:
                    continue
                held = f.get("held_crossing_t")
                ahead = [x for x in (c, held) if x is not None and f["t_last"] < x]
                if not ahead or min(ahead) - f["t_last"] > HORIZON_S:
                    seen = [e for e in events if e <= f["t_last"]]
                    false_warnings.append(
                        {
                            "t_last": f["t_last"],
                            "since_event_s": f["t_last"] - seen[-1] if seen else None,
                        }
                    )
                elif held is not None and held != c and f["eta_s"] is not None:
                    left = held - f["made_at"]
                    if left > 0:
                        held_errors.append(
                            {
                                "made_at": f["made_at"],
                                "eta_s": f["eta_s"],
                                "eta_lo_s": f["eta_lo_s"],
                                "eta_hi_s": f["eta_hi_s"],
                                "true_eta_s": left,
                                "rel_error": (f["eta_s"] - left) / left,
                                "inside_90": (f["eta_lo_s"] is None or f["eta_lo_s"] <= left)
                                and (f["eta_hi_s"] is None or left <= f["eta_hi_s"]),
                            }
                        )
            items[name] = {
                "events": events,
                "warned_as_things_stood": held_errors,
                "false_warnings": false_warnings,
                "true_crossing_t": c,
                "n_forecasts": len(fcs),
                "n_approaching": sum(
                    f["level_state"] in (ItemState.APPROACHING, ItemState.LATE) for f in fcs
                ),
                "states": sorted({f["state"] for f in fcs if f["state"]}),
                "level_states": sorted({f["level_state"] for f in fcs if f["level_state"]}),
                "alerts": [a["event"] for a in self.alerts if a["item"] == name],
                "told": [
                    {
                        "event": a["event"],
                        "level": a["body"].get("level"),
                        "at": a["at"],
                        "deadline_at_s": a["body"].get("deadline_at_s"),
                        "reached_at_s": a["body"].get("reached_at_s"),
                        "lead_s": a["body"].get("lead_s"),
                    }
                    for a in self.alerts
                    if a["item"] == name
                ],
                "ahead": errors,
            }
        return {
            "scenario": self.scenario.name,
            "t_start": self.scenario.t_start,
            "sim_end": self.clock.now(),
            "items": items,
            "n_alerts": len(self.alerts),
        }


def _epoch(text: str | None) -> float | None:
    if not text:
        return None
    try:
        return parse_time(text)
    except ValueError:
        return None


def alert_subscriber(host: str, port: int, prefix: str, recorder: Recorder, client_id: str) -> Any:
    """An MQTT client handing every alert published under ``prefix`` to ``recorder``."""
    c = mqtt.Client(
        mqtt.CallbackAPIVersion.VERSION2,
        client_id=client_id,
        protocol=mqtt.MQTTv311,
        clean_session=True,
    )

    def on_connect(client, userdata, flags, reason_code, properties):
        client.subscribe(f"{prefix}/#", qos=1)

    def on_message(client, userdata, msg):
        try:
            recorder.on_alert(msg.topic, msg.payload)
        except Exception:
            logging.getLogger("thermeta.demo").exception("alert line failed")

    c.on_connect, c.on_message = on_connect, on_message
    c.connect_async(host, port)
    c.loop_start()
    return c


def _count(n: int, noun: str) -> str:
    return f"{n} {noun}" if n == 1 else f"{n} {noun}s"


def print_summary(summary: dict[str, Any], out: Any) -> None:
    """The closing lines: per item, how the forecasts made ahead compare with the truth."""
    print(
        "forecasts against the simulated truth (remaining time to the crossing, forecasts made "
        "while approaching):",
        file=out,
    )
    for name, it in summary["items"].items():
        ahead = it["ahead"]
        truth = (
            "never crosses"
            if it["true_crossing_t"] is None
            else f"crosses at {local_clock(it['true_crossing_t'])}"
        )
        if ahead:
            errs = sorted(abs(a["rel_error"]) for a in ahead)
            med = errs[len(errs) // 2]
            inside = sum(a["inside_90"] for a in ahead) / len(ahead)
            how = (
                f"{_count(len(ahead), 'forecast')} ahead, median error {100 * med:.1f} %, "
                f"truth inside the 90 % interval in {100 * inside:.0f} %"
            )
        elif it["true_crossing_t"] is None:
            held = sorted(abs(e["rel_error"]) for e in it.get("warned_as_things_stood") or [])
            n_false = len(it.get("false_warnings") or [])
            n_app = it["n_approaching"]
            how = f"{_count(it['n_forecasts'], 'forecast')}, " + (
                f"{n_app} of them approaching a crossing that never comes"
                if n_app and not held
                else "none approaching"
                if not n_app
                else f"{_count(len(held), 'warning')} of a crossing that the surroundings as "
                f"they stood would bring (median error {100 * held[len(held) // 2]:.1f} % against "
                f"that), {n_false} of one they would not"
            )
        elif it["true_crossing_t"] > summary["sim_end"]:
            how = f"{_count(it['n_forecasts'], 'forecast')}, none approaching it yet"
        else:
            how = f"{_count(it['n_forecasts'], 'forecast')}, none approaching it before it came"
        alerts = ", ".join(str(a) for a in it["alerts"]) or "no alerts"
        print(f"  {name}: {truth}; {how}; {alerts}", file=out)
    print(f"{summary['n_alerts']} alerts in all", file=out, flush=True)
