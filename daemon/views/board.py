"""One frame of the dashboard, read from the store: a :class:`Board` of header facts and a
:class:`Row` per item, most urgent first (by state, ``states.RANK``, then the soonest early end of
the ETA interval).  An item with several levels, a deadline or a budget carries a
:class:`LevelLine` per level.  No drawing here: ``dashboard.py`` renders it."""

from __future__ import annotations

import math
import time
from dataclasses import dataclass, field
from typing import Any

from thermeta.daemon.levels.judge import epoch, remaining_s
from thermeta.daemon.states import RANK as URGENCY
from thermeta.daemon.states import rank

RANK: dict[str, int] = {state: i for i, state in enumerate(URGENCY)}
HEARTBEAT_LATE_S = 20.0  # the service writes one every 5 s; older than this, it is not running


@dataclass
class LevelLine:
    """One level of an item: its state and what it waits for (times counted from now)."""

    name: str
    kind: str
    state: str
    threshold: float | None
    stage: int | None = None
    eta_s: float | None = None
    eta_lo_s: float | None = None
    eta_hi_s: float | None = None
    deadline_s: float | None = None  # time left to the deadline (negative: passed)
    chance: float | None = None
    budget_left_s: float | None = None
    budget_state: str | None = None
    budget_out_s: float | None = None  # until the budget runs out at the present course


@dataclass
class AlertLine:
    """One of the newest alerts, and how its delivery stands."""

    at: float
    item: str
    event: str
    headline: str
    delivery: str  # "sent", "waiting", "not sent" (given up), "no hook"


@dataclass
class Row:
    item: str
    state: str
    unit: str = "C"
    value: float | None = None
    threshold: float | None = None
    eta_s: float | None = None
    eta_lo_s: float | None = None
    eta_hi_s: float | None = None
    ambient: float | None = None
    tau_s: float | None = None
    trend_per_h: float | None = None
    spark: list[float] = field(default_factory=list)
    group: str = ""
    alert: str | None = None  # the open incident's state, "+ack" when acknowledged
    defrost: bool = False  # the controller's defrost signal is on: new alerts are held
    kind: str = "limit"  # the focus level's
    levels: list[LevelLine] = field(default_factory=list)  # when there is more than one question
    episode: str | None = None  # the open episode: its batch name or number
    lead_s: float | None = None  # the focus level's lead: inside it, time is short
    due_passed: bool = False  # the forecast's crossing time has come without a reading

    @property
    def urgency(self) -> tuple:
        soon = self.eta_lo_s if self.eta_lo_s is not None else self.eta_s
        return (rank(self.state), math.inf if soon is None else soon, self.item)


@dataclass
class Board:
    rows: list[Row]
    connected: bool | None = None
    running: bool = False
    broker: str = "?"
    readings_per_s: float | None = None
    dead_letters: int | None = None
    last_refit_at: float | None = None
    heartbeat_at: float | None = None
    now: float = 0.0
    alerts_waiting: int = 0  # outbox rows not yet taken by their hook
    alerts: list[AlertLine] = field(default_factory=list)  # the newest, newest first


def service_running(heartbeat: dict[str, Any], now: float) -> bool:
    """Whether the service's last heartbeat (the store's "daemon" meta) says it runs now."""
    beat = heartbeat.get("heartbeat_at")
    return (
        heartbeat.get("state") == "running" and beat is not None and now - beat < HEARTBEAT_LATE_S
    )


def _group_of(item: str, body: dict[str, Any], topic: str | None) -> str:
    if body.get("site"):
        return str(body["site"])
    if "/" in item:
        return item.split("/", 1)[0]
    if topic and "/" in topic:
        return topic.split("/", 1)[0]
    return item.split("-", 1)[0]


def collect(
    store: Any,
    now: float | None = None,
    *,
    history_s: float = 3 * 3600.0,
    spark_n: int = 48,
    stats: dict[str, Any] | None = None,
) -> Board:
    """Everything one frame shows, read from the store (and the live stats when in-process)."""
    now = time.time() if now is None else now
    daemon = dict(store.get_meta("daemon") or {})
    if stats:
        daemon.update(stats, heartbeat_at=now, state="running")
    running = service_running(daemon, now)
    topics = {r["name"]: r.get("topic") for r in store.list_items(None)}
    alert_levels, waiting = _alert_levels(store)
    rows = []
    recent = store.recent_series(now - history_s)  # one query for every item's sparkline
    for f in store.latest_forecasts():
        d, name = f.forecast, f.item
        series = recent.get(name, [])
        unit = d.get("unit", "C")
        if unit != "C":
            from thermeta.daemon.units import from_celsius

            series = [(t, from_celsius(v, unit)) for t, v in series]
        rows.append(
            Row(
                item=name,
                state=f.state,
                unit=unit,
                value=d.get("value_now"),
                threshold=d.get("threshold"),
                eta_s=remaining_s(d, "eta_s", now),
                eta_lo_s=remaining_s(d, "eta_lo_s", now),
                eta_hi_s=remaining_s(d, "eta_hi_s", now),
                ambient=d.get("ambient"),
                tau_s=d.get("time_constant_s"),
                trend_per_h=_trend_per_h(series),
                spark=_buckets(series, now - history_s, now, spark_n),
                group=_group_of(name, d, topics.get(name)),
                alert=alert_levels.get(name),
                defrost=bool((d.get("defrost") or {}).get("on")),
                kind=str(d.get("kind") or "limit"),
                levels=level_lines(d, now),
                episode=_episode_label(d),
                lead_s=_focus_lead(d),
                due_passed=_due_passed(d, now),
            )
        )
    return Board(
        rows=rows,
        connected=daemon.get("connected"),
        running=running,
        broker=str(daemon.get("broker", "?")),
        readings_per_s=daemon.get("readings_per_s"),
        dead_letters=daemon.get("dead_letters"),
        last_refit_at=store.last_refit_at(),
        heartbeat_at=daemon.get("heartbeat_at"),
        now=now,
        alerts_waiting=waiting,
        alerts=newest_alerts(store),
    )


def _focus_lead(d: dict[str, Any]) -> float | None:
    for lv in d.get("levels") or []:
        if lv.get("name") == d.get("focus") and lv.get("lead_s") is not None:
            return float(lv["lead_s"])
    return None


def _due_passed(d: dict[str, Any], now: float) -> bool:
    """The forecast crossing time is behind us while no newer reading came."""
    eta, last = d.get("eta_s"), epoch(d.get("last_reading_at"))
    return eta is not None and eta > 0 and last is not None and last + eta < now


def newest_alerts(store: Any, n: int = 4) -> list[AlertLine]:
    """The newest ``n`` alerts with their delivery: every hook took it ("sent"), one still
    trying ("waiting"), one gave up ("not sent"), or no hook wanted it ("no hook")."""
    from thermeta.storage.alerts import AlertStore, OutboxStatus

    if not store.has_table("alert_events"):
        return []
    a = AlertStore(store)
    events = a.events(limit=n)[::-1]
    sent = a.deliveries([int(e["id"]) for e in events])
    out = []
    for e in events:
        body = e["body"]
        states = {status for _, status in sent.get(int(e["id"]), [])}
        if not states:
            delivery = "no hook"
        elif OutboxStatus.FAILED in states:
            delivery = "not sent"
        elif OutboxStatus.PENDING in states:
            delivery = "waiting"
        else:
            delivery = "sent"
        out.append(
            AlertLine(
                at=float(e["made_at"]),
                item=str(e["item"]),
                event=str(body.get("event", e["level"])),
                headline=str(body.get("headline") or e["sentence"]),
                delivery=delivery,
            )
        )
    return out


def level_lines(d: dict[str, Any], now: float) -> list[LevelLine]:
    """The item's levels as lines, when it asks more than one plain limit question."""
    docs = d.get("levels") or []
    plain = len(docs) == 1 and docs[0].get("kind") == "limit" and "budget" not in docs[0]
    if not docs or plain:
        return []
    out = []
    for lv in docs:
        b = lv.get("budget") or {}
        out_at = epoch(b.get("runs_out_at"))
        deadline = lv.get("deadline_at_s")
        out.append(
            LevelLine(
                name=str(lv.get("name")),
                kind=str(lv.get("kind")),
                state=str(lv.get("state")),
                threshold=lv.get("threshold"),
                stage=lv.get("stage"),
                # a level's ETAs count from when the forecast was made
                eta_s=_since_made(lv.get("eta_s"), d, now),
                eta_lo_s=_since_made(lv.get("eta_lo_s"), d, now),
                eta_hi_s=_since_made(lv.get("eta_hi_s"), d, now),
                deadline_s=None if deadline is None else deadline - now,
                chance=lv.get("chance"),
                budget_left_s=b.get("left_s"),
                budget_state=b.get("state"),
                budget_out_s=None if out_at is None else out_at - now,
            )
        )
    return out


def _since_made(left: float | None, d: dict[str, Any], now: float) -> float | None:
    made = epoch(d.get("updated_at"))
    if left is None:
        return None
    return max(0.0, left - (0.0 if made is None else max(0.0, now - made)))


def _episode_label(d: dict[str, Any]) -> str | None:
    ep = d.get("episode") or {}
    if not ep or ep.get("ended_at"):
        return None
    return str(ep.get("batch") or f"#{ep.get('id')}")


def _alert_levels(store: Any) -> tuple[dict[str, str], int]:
    """The open incident's most pressing state per item ("+ack" when acknowledged) and the
    outbox rows waiting."""
    from thermeta.daemon.alerts.rules import ItemAlertState
    from thermeta.storage.alerts import AlertStore, OutboxStatus

    if not store.has_table("alert_state"):
        return {}, 0  # a store from before alerts: the board still shows forecasts
    a = AlertStore(store)
    out = {}
    for item, raw in a.load_states().items():
        st = ItemAlertState.from_json(raw)
        if st.incident_open and st.open_states:
            worst = min(st.open_states.values(), key=rank)
            acked = a.ack_of(item, st.incident) is not None
            out[item] = str(worst) + ("+ack" if acked else "")
    return out, a.outbox_counts()[OutboxStatus.PENDING]


def _trend_per_h(series: list[tuple[float, float]], span_s: float = 1800.0) -> float | None:
    """Least-squares slope of the last ``span_s`` of readings, in degrees per hour."""
    if len(series) < 3:
        return None
    t_end = series[-1][0]
    pts = [(t, v) for t, v in series if t >= t_end - span_s]
    if len(pts) < 3:
        return None
    n = len(pts)
    mt = sum(t for t, _ in pts) / n
    mv = sum(v for _, v in pts) / n
    sxx = sum((t - mt) ** 2 for t, _ in pts)
    if sxx <= 0:
        return None
    # slope = sum((t - mean t)(v - mean v)) / sum((t - mean t)^2)
    return 3600.0 * sum((t - mt) * (v - mv) for t, v in pts) / sxx


def _buckets(series: list[tuple[float, float]], t0: float, t1: float, n: int) -> list[float]:
    """Mean value per time bucket (NaN where empty), for the sparkline."""
    sums, counts = [0.0] * n, [0] * n
    for t, v in series:
        i = min(n - 1, max(0, int((t - t0) / (t1 - t0) * n)))
        sums[i] += v
        counts[i] += 1
    return [s / c if c else math.nan for s, c in zip(sums, counts)]
