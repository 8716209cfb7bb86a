"""One frame of the dashboard, read from the store: a :class:`Board` of header facts and a
:class:`Row` per item, most urgent first (crossed, then the soonest early end of the ETA
interval).  No drawing here: ``dashboard.py`` renders it."""

from __future__ import annotations

import math
import time
from dataclasses import dataclass, field
from typing import Any

from thermeta.daemon.alerts.rules import remaining_s
from thermeta.daemon.states import EpisodeLevel, ItemState

URGENCY = (  # most urgent first
    ItemState.CROSSED,
    ItemState.APPROACHING,
    ItemState.STALE,
    ItemState.LEARNING,
    ItemState.STEADY,
)
RANK: dict[str, int] = {state: rank for rank, state in enumerate(URGENCY)}
HEARTBEAT_LATE_S = 20.0  # the service writes one every 5 s; older than this, it is not running


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
    alert: str | None = None  # the open alert level, "+ack" when acknowledged
    defrost: bool = False  # the controller's defrost signal is on: new alerts are held

    @property
    def urgency(self) -> tuple:
        soon = self.eta_lo_s if self.eta_lo_s is not None else self.eta_s
        return (RANK.get(self.state, 5), math.inf if soon is None else soon, self.item)


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
    for f in store.latest_forecasts():
        d, name = f.forecast, f.item
        series = store.recent_readings(name, since_ts=now - history_s)
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
    )


def _alert_levels(store: Any) -> tuple[dict[str, str], int]:
    """Open alert levels per item ("+ack" when acknowledged) and the outbox rows waiting."""
    from thermeta.storage.alerts import AlertStore, OutboxStatus

    if not store.has_table("alert_state"):
        return {}, 0  # a store from before alerts: the board still shows forecasts
    a = AlertStore(store)
    out = {}
    for item, st in a.load_states().items():
        if st.get("level", EpisodeLevel.CLEAR) != EpisodeLevel.CLEAR:
            acked = a.ack_of(item, int(st.get("episode", 0))) is not None
            out[item] = st["level"] + ("+ack" if acked else "")
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
