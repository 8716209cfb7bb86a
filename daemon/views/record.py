"""An item's record over an episode or a span, read from the store: what ``thermeta report``
prints as PDF, CSV or JSON.

    rec = gather(cfg, store, "tray-c", episode_id=12)     # or since=..., until=...
    rec.to_json()

It holds the readings, each level's first pass (a target reached, a limit crossed) and, for a
target with a deadline, whether it was made; the time and degree-minutes beyond each limit, the
budgets used, the mean kinetic temperature, the forecast history (what each refit forecast for
each level, and how that turned out against the actual pass), the alerts with their deliveries,
the acknowledgements, and the caution.  Everything is computed from the stored readings, so a
record made twice is the same record.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

from thermeta.daemon.alerts.message import CAUTION_FULL
from thermeta.daemon.levels.spec import Level, auto_side, levels_of
from thermeta.daemon.levels.tally import MAX_GAP_S, Excursion, Tally
from thermeta.daemon.units import from_celsius
from thermeta.predictors.result import rfc3339
from thermeta.storage.errors import InputError


@dataclass
class Record:
    """One item's record (times epoch s; temperatures in the item's unit)."""

    item: str
    unit: str
    site: str | None
    since: float
    until: float
    made_at: float
    episode: dict[str, Any] | None
    readings: list[tuple[float, float]]
    levels: list[dict[str, Any]]  # each level: kind, threshold, side, first pass, deadline ...
    mkt: float | None
    covered_s: float
    gap_s: float
    forecasts: list[dict[str, Any]] = field(default_factory=list)
    alerts: list[dict[str, Any]] = field(default_factory=list)
    acks: list[dict[str, Any]] = field(default_factory=list)
    caution: str = CAUTION_FULL

    def to_json(self) -> dict[str, Any]:
        return {
            "item": self.item,
            "unit": self.unit,
            "site": self.site,
            "since": rfc3339(self.since),
            "until": rfc3339(self.until),
            "made_at": rfc3339(self.made_at),
            "episode": self.episode,
            "levels": self.levels,
            "mkt": self.mkt,
            "covered_s": round(self.covered_s, 1),
            "gap_s": round(self.gap_s, 1),
            "readings": [{"time": rfc3339(t), "value": v} for t, v in self.readings],
            "forecasts": self.forecasts,
            "alerts": self.alerts,
            "acks": self.acks,
            "caution": self.caution,
        }


def item_config(cfg: Any, store: Any, name: str) -> Any:
    """The item's config (written out, or made from a wildcard); InputError when unknown."""
    from thermeta.daemon.ingest.topics import Router

    topics = {r["name"]: r.get("topic") for r in store.list_items("load")}
    item = Router(cfg.items).item_for(name, topics.get(name))
    if item is None:
        raise InputError(f"no item named {name!r} in the config")
    return item


def gather(
    cfg: Any,
    store: Any,
    name: str,
    *,
    now: float,
    episode_id: int | None = None,
    since: float | None = None,
    until: float | None = None,
) -> Record:
    """The record of item ``name``: of episode ``episode_id``, or of [since, until], or (neither)
    of its newest episode, else of its last rolling period."""
    from thermeta.storage.episodes import Episode, EpisodeStore

    item = item_config(cfg, store, name)
    eps = EpisodeStore(store)
    ep: Episode | None = None
    newest = store.last_reading_times().get(name)
    now = now if newest is None else max(now, newest)  # an open episode runs to its newest reading
    if episode_id is not None:
        ep = eps.get(episode_id)
        if ep is None or ep.item != name:
            raise InputError(f"{name} has no episode {episode_id}")
        since, until = ep.opened_at, ep.closed_at if ep.closed_at is not None else now
    elif since is None and until is None:
        past = eps.of_item(name)
        if past:
            ep = past[-1]
            since, until = ep.opened_at, ep.closed_at if ep.closed_at is not None else now
    until = now if until is None else until
    since = until - item.period_s if since is None else since
    if until <= since:
        raise InputError("the span is empty: --until must come after --since")
    rows = store.recent_readings(name, since_ts=since, until_ts=until)
    levels = levels_of(item)
    recorded = eps.sides(name)
    first_value = None if not rows else from_celsius(rows[0][1], item.unit)
    sides = {
        lv.name: lv.side
        if lv.side != "auto"
        else recorded.get(lv.name) or auto_side(lv, first_value)
        for lv in levels
    }
    tl = Tally(since_s=since)
    for lv in levels:
        side = sides[lv.name]
        if side is None:
            continue
        tl.targets[lv.name] = (lv.threshold_c, side)  # type: ignore[assignment]
        if not lv.is_target:
            tl.excursions[lv.name] = Excursion(lv.threshold_c, side)  # type: ignore[arg-type]
    tl.add([r[0] for r in rows], [r[1] for r in rows])
    _passes_at_the_end(store, name, tl, until)
    level_docs = [_level(lv, sides[lv.name], tl, ep, since, until, item.unit) for lv in levels]
    mkt = tl.mkt_c
    rec = Record(
        item=name,
        unit=item.unit,
        site=item.site,
        since=since,
        until=until,
        made_at=now,
        episode=None if ep is None else ep.to_json(),
        readings=[(t, from_celsius(v, item.unit)) for t, v in rows],
        levels=level_docs,
        mkt=None if mkt is None else from_celsius(mkt, item.unit),
        covered_s=tl.covered_s,
        gap_s=tl.gap_s,
    )
    rec.forecasts = _forecasts(store, name, since, until, tl)
    rec.alerts, rec.acks = _alerts(store, name, since, until)
    return rec


def _passes_at_the_end(store: Any, name: str, tl: Tally, until: float) -> None:
    """A level passed between the span's last reading and the next one (an episode closes at the
    moment its last target is reached, between two readings): found on the line to the next."""
    if tl.last_t is None or set(tl.targets) <= set(tl.reached):
        return
    after = store.recent_readings(name, since_ts=tl.last_t + 1e-6, until_ts=until + MAX_GAP_S)
    if not after:
        return
    probe = Tally(targets=dict(tl.targets), reached=dict(tl.reached), pending=dict(tl.pending))
    probe.last_t, probe.last_v = tl.last_t, tl.last_v
    probe.add([r[0] for r in after[:2]], [r[1] for r in after[:2]])  # a pass and its confirmation
    for k, t in probe.reached.items():
        if k not in tl.reached and t <= until + 1.0:
            tl.reached[k] = min(t, until)


def _level(
    lv: Level, side: Any, tl: Tally, ep: Any, since: float, until: float, unit: str
) -> dict[str, Any]:
    from thermeta.daemon.units import scale_from_celsius

    passed = tl.reached.get(lv.name)
    deadline = None
    if lv.is_target and lv.has_deadline:
        deadline = lv.deadline(None if ep is None else ep.opened_at, since)
    d: dict[str, Any] = {
        "name": lv.name,
        "kind": lv.kind,
        "stage": lv.stage,
        "threshold": lv.threshold,
        "side": side,
        "first_passed_at": rfc3339(passed),
        "first_passed_at_s": passed,
        "deadline_at": rfc3339(deadline),
        "deadline_at_s": deadline,
        "within_s": lv.within_s,
        "by": lv.by,
    }
    if deadline is not None:
        if passed is not None:
            d["made"] = passed <= deadline
        elif until >= deadline:
            d["made"] = False
        else:
            d["made"] = None  # not yet known
    ex = tl.excursions.get(lv.name)
    if ex is not None:
        d["beyond_s"] = round(ex.beyond_s, 1)
        d["degree_minutes"] = round(scale_from_celsius(ex.degree_s / 60.0, unit), 3)
        if lv.budget_s is not None:
            d["budget"] = {
                "allowed_s": lv.budget_s,
                "used_s": round(ex.beyond_s, 1),
                "left_s": round(max(0.0, lv.budget_s - ex.beyond_s), 1),
            }
    return d


def _forecasts(
    store: Any, name: str, since: float, until: float, tl: Tally
) -> list[dict[str, Any]]:
    """What each refit forecast for each level, against when the level was actually passed."""
    out = []
    for f in reversed(store.forecast_history(name, limit=100_000, since=since, until=until)):
        body = f.forecast
        docs = body.get("levels") or []
        for d in docs:
            eta, lo, hi = d.get("eta_s"), d.get("eta_lo_s"), d.get("eta_hi_s")  # from made_at
            actual = tl.reached.get(str(d.get("name")))
            row: dict[str, Any] = {
                "made_at": rfc3339(f.made_at),
                "made_at_s": f.made_at,
                "level": d.get("name"),
                "state": d.get("state"),
                "value_now": body.get("value_now"),
                "forecast_at_s": None if eta is None else f.made_at + eta,
                "lo_at_s": None if lo is None else f.made_at + lo,
                "hi_at_s": None if hi is None else f.made_at + hi,
                "chance": d.get("chance"),
                "actual_at_s": actual,
            }
            if actual is not None and eta is not None and actual > f.made_at:
                row["error_s"] = round(f.made_at + eta - actual, 1)
                row["inside_90"] = (lo is None or f.made_at + lo <= actual) and (
                    hi is None or actual <= f.made_at + hi
                )
            for k in ("forecast_at", "lo_at", "hi_at", "actual_at"):
                row[k] = rfc3339(row[k + "_s"])
            out.append(row)
    return out


def _alerts(
    store: Any, name: str, since: float, until: float
) -> tuple[list[dict[str, Any]], list[dict[str, Any]]]:
    from thermeta.storage.alerts import AlertStore, OutboxStatus

    if not store.has_table("alert_events"):
        return [], []
    a = AlertStore(store)
    events = [e for e in a.events(name, limit=100_000) if since <= e["made_at"] <= until]
    sent = a.deliveries([int(e["id"]) for e in events])
    alerts = []
    for e in events:
        body = e["body"]
        hooks = sent.get(int(e["id"]), [])
        alerts.append(
            {
                "at": rfc3339(e["made_at"]),
                "at_s": e["made_at"],
                "event": body.get("event", e["level"]),
                "level": body.get("level"),
                "incident": body.get("incident", e["episode"]),
                "reminder": bool(body.get("reminder")),
                "sentence": e["sentence"],
                "delivered": sorted(h for h, s in hooks if s == OutboxStatus.DELIVERED),
                "pending": sorted(h for h, s in hooks if s == OutboxStatus.PENDING),
            }
        )
    acks = [
        {
            "at": rfc3339(r["acked_at"]),
            "at_s": r["acked_at"],
            "incident": r["incident"],
            "by": r["by"],
            "note": r["note"],
        }
        for r in a.acks(name)
        if since <= r["acked_at"] <= until
    ]
    return alerts, acks
