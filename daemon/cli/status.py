"""``thermeta status --config FILE [--json]``: counts and health read from the store (works while
the daemon runs: SQLite in WAL mode lets readers in beside the writer)."""

from __future__ import annotations

import argparse
import json
from typing import Any


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("--config", required=True, metavar="FILE", help="the TOML config")
    p.add_argument("--json", action="store_true", help="one JSON object on stdout")


def period_figures(cfg: Any, store: Any, topics: dict[str, str | None], now: float) -> dict:
    """Each item's rolling period from the store: time and degree-minutes beyond each limit, and
    the mean kinetic temperature, by item (those whose config is known); the readings of all in
    a few queries (a site's status reads thousands of items)."""
    from thermeta.daemon.ingest.topics import Router
    from thermeta.daemon.levels.spec import levels_of
    from thermeta.daemon.levels.tally import new_tally
    from thermeta.storage.episodes import EpisodeStore

    router = Router(cfg.items)
    found = {name: router.item_for(name, topic) for name, topic in topics.items()}
    known = {name: item for name, item in found.items() if item is not None}
    has_sides = store.has_table("level_sides")
    recorded = EpisodeStore(store).sides_of(list(known)) if has_sides else {}
    ids = store.item_ids(list(known))
    windows = store.windows([(ids[n], now - it.period_s) for n, it in known.items() if n in ids])
    out = {}
    for name, item in known.items():
        levels = levels_of(item)
        mine = recorded.get(name, {})
        sides = {lv.name: (lv.side if lv.side != "auto" else mine.get(lv.name)) for lv in levels}
        tl = new_tally(levels, sides, now - item.period_s)  # type: ignore[arg-type]
        t, y = windows.get(ids.get(name, -1), ([], []))
        upto = sum(1 for ts in t if ts <= now)  # oldest first
        tl.add(list(t[:upto]), list(y[:upto]))
        fig = tl.to_json(item.unit)
        fig.pop("reached", None)
        fig["period_s"] = item.period_s
        out[name] = fig
    return out


def collect(cfg: Any, store: Any, now: float) -> dict[str, Any]:
    from thermeta.daemon.views.board import service_running
    from thermeta.predictors.result import rfc3339

    counts = store.counts()
    daemon = store.get_meta("daemon") or {}
    running = service_running(daemon, now)
    topics = {r["name"]: r.get("topic") for r in store.list_items("load")}
    periods = period_figures(cfg, store, topics, now)
    per_item = []
    seen = set()
    for f in store.latest_forecasts():
        d = f.forecast
        seen.add(f.item)
        crossing = d.get("crossing_at")
        per_item.append(
            {
                "item": f.item,
                "state": f.state,
                "kind": d.get("kind"),
                "side": d.get("side"),
                "focus": d.get("focus"),
                "value_now": d.get("value_now"),
                "threshold": d.get("threshold"),
                "unit": d.get("unit", "C"),
                "eta_s": d.get("eta_s"),
                "eta_lo_s": d.get("eta_lo_s"),
                "eta_hi_s": d.get("eta_hi_s"),
                "crossing_at": crossing,
                "last_reading_at": d.get("last_reading_at"),
                "updated_at": d.get("updated_at"),
                "fit_ok": d.get("fit_ok"),
                "reason": d.get("reason"),
                "levels": d.get("levels") or [],
                "episode": d.get("episode"),
                "period": periods.get(f.item),
            }
        )
    for it in cfg.items:
        if not it.is_pattern and it.name not in seen:
            per_item.append(
                {
                    "item": it.name,
                    "state": None,
                    "kind": None,
                    "side": None,
                    "focus": None,
                    "levels": [],
                    "episode": None,
                    "period": None,
                    "value_now": None,
                    "threshold": it.threshold,
                    "unit": it.unit,
                    "eta_s": None,
                    "eta_lo_s": None,
                    "eta_hi_s": None,
                    "crossing_at": None,
                    "last_reading_at": None,
                    "updated_at": None,
                    "fit_ok": None,
                    "reason": "no forecast yet",
                }
            )
    last_refit = store.last_refit_at()
    group = getattr(getattr(cfg, "cluster", None), "group", None)
    return {
        "cluster": None
        if not group
        else {"group": group, "instances": instances(store, group, now)},
        "items": counts["items"],
        "readings": counts["readings"],
        "dead_letters": counts["dead_letters"],
        "last_refit_at": rfc3339(last_refit),
        "daemon": {
            "running": running,
            "state": daemon.get("state"),
            "heartbeat_at": rfc3339(daemon.get("heartbeat_at")),
            "pid": daemon.get("pid"),
            "connected": daemon.get("connected"),
            "readings_per_s": daemon.get("readings_per_s"),
        },
        "per_item": sorted(per_item, key=lambda r: r["item"]),
    }


def instances(store: Any, group: str, now: float) -> list[dict[str, Any]]:
    """Each daemon of the group that ever wrote its own heartbeat (``[cluster] instance``): its
    process, whether it runs now (a heartbeat within the last 20 s), running ones first."""
    from thermeta.daemon.views.board import service_running
    from thermeta.predictors.result import rfc3339
    from thermeta.storage.store import INSTANCE_BEAT

    out = [
        {
            "instance": b.get("instance"),
            "running": service_running(b, now),
            "state": b.get("state"),
            "heartbeat_at": rfc3339(b.get("heartbeat_at")),
            "pid": b.get("pid"),
            "host": b.get("host"),
            "connected": b.get("connected"),
            "readings_per_s": b.get("readings_per_s"),
        }
        for b in store.meta_with_prefix(INSTANCE_BEAT).values()
        if isinstance(b, dict) and b.get("group") == group and b.get("instance")
    ]
    return sorted(out, key=lambda d: (not d["running"], str(d["instance"])))


def _head_lines(info: dict[str, Any], now: float) -> list[str]:
    """The daemon (or, in a [cluster], each daemon of the group running now)."""
    from thermeta.daemon.timefmt import clock, parse_time

    def process(d: dict[str, Any]) -> str:
        return (
            f"pid {d['pid']}{' on ' + d['host'] if d.get('host') else ''}, broker "
            f"{'connected' if d['connected'] else 'NOT connected'}, "
            f"{d['readings_per_s'] or 0:.1f} readings/s"
        )

    def seen(beat: str | None) -> str:
        return clock(parse_time(beat), now) if beat else "never"

    cluster = info.get("cluster")
    if cluster:
        alive = [d for d in cluster["instances"] if d["running"]]
        gone = [d for d in cluster["instances"] if not d["running"]]
        lines = [f"cluster {cluster['group']}: {len(alive)} daemon(s) running"]
        lines += [f"  {d['instance']}: {process(d)}" for d in alive]
        if gone:
            lines.append(
                "  not running: "
                + ", ".join(
                    f"{d['instance']} (last heartbeat {seen(d['heartbeat_at'])})" for d in gone
                )
            )
        return lines
    d = info["daemon"]
    if d["running"]:
        return [
            f"daemon running (pid {d['pid']}), broker "
            f"{'connected' if d['connected'] else 'NOT connected'}, "
            f"{d['readings_per_s'] or 0:.1f} readings/s"
        ]
    return [f"daemon not running (last heartbeat {seen(d['heartbeat_at'])})"]


def _eta_text(r: dict[str, Any], now: float) -> str:
    from thermeta.daemon.alerts.rules import remaining_s
    from thermeta.daemon.states import ItemState
    from thermeta.daemon.timefmt import clock, duration, parse_time, span

    if r["state"] == ItemState.CROSSED:
        return "past the threshold"
    if r["state"] in (ItemState.REACHED, ItemState.MISSED, ItemState.WAITING):
        return str(r["state"])
    if r["crossing_at"] is None:
        return "-"
    due = parse_time(r["crossing_at"])
    if due <= now:
        # the forecast's time has come without a reading saying what happened
        return f"was due at {clock(due, now)}, no reading since"
    # the point and both ends count from now the same way (from the newest reading, less the
    # time since it), so the point always lies inside its interval
    text = f"in {duration(remaining_s(r, 'eta_s', now))}"
    if r["eta_lo_s"] is not None or r["eta_hi_s"] is not None:
        # the forecast's interval counts from its newest reading; the line counts from now
        lo, hi = remaining_s(r, "eta_lo_s", now), remaining_s(r, "eta_hi_s", now)
        text += f" (90 %: {span(lo, hi)})"
    return text


def run(args: argparse.Namespace) -> int:
    import time

    from thermeta.daemon.cli.common import load_config_or_report, open_store
    from thermeta.daemon.timefmt import clock, duration, parse_time
    from thermeta.daemon.units import UNIT_SIGN

    cfg = load_config_or_report(args.config)
    if cfg is None:
        return 2
    store = open_store(cfg, "status")
    if store is None:
        return 1
    try:
        now = time.time()
        info = collect(cfg, store, now)
    finally:
        store.close()
    if args.json:
        print(json.dumps(info))
        return 0
    last = info["last_refit_at"]
    ago = f"{clock(parse_time(last), now)} ({duration(now - parse_time(last))} ago)" if last else ""
    for line in _head_lines(info, now):
        print(line)
    print(
        f"items {info['items']}, readings {info['readings']}, dead letters {info['dead_letters']}, "
        f"last refit {ago or 'never'}"
    )
    rows = [("ITEM", "STATE", "NOW", "LEVEL", "DUE")]
    for r in info["per_item"]:
        u = UNIT_SIGN.get(r["unit"], r["unit"])
        rows.append(
            (
                r["item"],
                r["state"] or "-",
                f"{r['value_now']:.1f} {u}" if r["value_now"] is not None else "-",
                f"{r['threshold']:g} {u}" if r["threshold"] is not None else "-",
                _eta_text(r, now),
            )
        )
    widths = [max(len(row[i]) for row in rows) for i in range(4)]
    details = {r["item"]: _detail_lines(r, now) for r in info["per_item"]}
    for i, row in enumerate(rows):
        print("  ".join(c.ljust(w) for c, w in zip(row[:4], widths)) + "  " + row[4])
        for line in details.get(row[0], []) if i else []:
            print("    " + line)
    from thermeta.daemon.alerts.message import CAUTION_FULL

    print(CAUTION_FULL)
    return 0


def _detail_lines(r: dict[str, Any], now: float) -> list[str]:
    """Under an item: each level with more than a plain limit to tell, the open episode, the
    rolling period's figures."""
    from thermeta.daemon.timefmt import duration, local_clock, parse_time, span
    from thermeta.daemon.units import UNIT_SIGN

    u = UNIT_SIGN.get(r["unit"], r["unit"])
    out = []
    levels = r.get("levels") or []
    made = parse_time(r["updated_at"]) if r.get("updated_at") else now
    since = max(0.0, now - made)  # a level's times count from its refit (never from the future)
    for lv in levels:
        if len(levels) == 1 and lv.get("kind") == "limit" and not lv.get("budget"):
            break
        side = lv.get("side") or "side not yet known"
        head = f"{lv['name']}: {lv['kind']} {lv['threshold']:g} {u} ({side}), {lv['state']}"
        eta = lv.get("eta_s")
        if eta is not None and lv["state"] not in ("reached", "missed", "crossed"):
            left = max(0.0, eta - since)
            hi = lv.get("eta_hi_s")
            head += f", forecast in {duration(left)}"
            if lv.get("eta_lo_s") is not None or hi is not None:
                lo = max(0.0, (lv.get("eta_lo_s") or 0) - since)
                hi_left = None if hi is None else max(0.0, hi - since)
                head += f" (90 %: {span(lo, hi_left)})"
        if lv.get("deadline_at_s") is not None:
            head += f", deadline {local_clock(lv['deadline_at_s'], True)}"
            if lv["state"] == "reached":
                head += ", made" if lv.get("chance") == 1.0 else ", missed the deadline"
            elif lv.get("chance") is not None:
                head += f", chance of making it {100 * lv['chance']:.0f} %"
        if lv.get("reached_at"):
            head += f", reached {local_clock(parse_time(lv['reached_at']), True)}"
        b = lv.get("budget")
        if b:
            head += (
                f"; budget {duration(b['used_s'])} of {duration(b['allowed_s'])} "
                f"used ({b['over']}), {b['state']}"
            )
            if b.get("runs_out_at") and b["state"] != "used_up":
                head += f", runs out {local_clock(parse_time(b['runs_out_at']), True)}"
        out.append(head)
    ep = r.get("episode")
    if ep:
        text = f"episode {ep['id']}" + (f" ({ep['batch']})" if ep.get("batch") else "")
        text += f" started {local_clock(parse_time(ep['started_at']), True)} by {ep['started_by']}"
        if ep.get("ended_at"):
            when = local_clock(parse_time(ep["ended_at"]), True)
            text += f", ended {when} by {ep['ended_by']}"
        mkt = (ep.get("tally") or {}).get("mkt")
        if mkt is not None:
            text += f", mean kinetic temperature {mkt:.2f} {u}"
        out.append(text)
    p = r.get("period")
    if p and any(v["beyond_s"] > 0 for v in (p.get("beyond") or {}).values()):
        parts = [
            f"{k}: {duration(v['beyond_s'])} beyond, {v['degree_minutes']:.1f} {u}·min"
            for k, v in p["beyond"].items()
        ]
        mkt = "" if p.get("mkt") is None else f"; mean kinetic temperature {p['mkt']:.2f} {u}"
        out.append(f"last {duration(p['period_s'])}: " + "; ".join(parts) + mkt)
    return out
