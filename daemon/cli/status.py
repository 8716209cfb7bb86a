"""``thermeta status --config FILE [--json]``: counts and health read from the store (works while
the daemon runs: SQLite in WAL mode lets readers in beside the writer)."""

from __future__ import annotations

import argparse
import json
from typing import Any


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("--config", required=True, metavar="FILE", help="the TOML config")
    p.add_argument("--json", action="store_true", help="one JSON object on stdout")


def collect(cfg: Any, store: Any, now: float) -> dict[str, Any]:
    from thermeta.daemon.views.board import service_running
    from thermeta.predictors.result import rfc3339

    counts = store.counts()
    daemon = store.get_meta("daemon") or {}
    running = service_running(daemon, now)
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
            }
        )
    for it in cfg.items:
        if not it.is_pattern and it.name not in seen:
            per_item.append(
                {
                    "item": it.name,
                    "state": None,
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
    return {
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


def _eta_text(r: dict[str, Any], now: float) -> str:
    from thermeta.daemon.alerts.rules import remaining_s
    from thermeta.daemon.states import ItemState
    from thermeta.daemon.timefmt import human_duration, parse_time

    if r["state"] == ItemState.CROSSED:
        return "past the threshold"
    if r["crossing_at"] is None:
        return "-"
    left = parse_time(r["crossing_at"]) - now
    text = f"in {human_duration(left)}" if left > 0 else "due now"
    if r["eta_lo_s"] is not None or r["eta_hi_s"] is not None:
        # the forecast's interval counts from its newest reading; the line counts from now
        lo, hi = remaining_s(r, "eta_lo_s", now), remaining_s(r, "eta_hi_s", now)
        hi_text = human_duration(hi) if hi is not None else "open"
        text += f" (90 %: {human_duration(lo)} to {hi_text})"
    return text


def run(args: argparse.Namespace) -> int:
    import time

    from thermeta.daemon.cli.common import load_config_or_report, open_store
    from thermeta.daemon.timefmt import human_duration, parse_time
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
    d = info["daemon"]
    if d["running"]:
        head = (
            f"daemon running (pid {d['pid']}), broker "
            f"{'connected' if d['connected'] else 'NOT connected'}, "
            f"{d['readings_per_s'] or 0:.1f} readings/s"
        )
    else:
        head = f"daemon not running (last heartbeat {d['heartbeat_at'] or 'never'})"
    last = info["last_refit_at"]
    ago = f" ({human_duration(now - parse_time(last))} ago)" if last else ""
    print(head)
    print(
        f"items {info['items']}, readings {info['readings']}, dead letters {info['dead_letters']}, "
        f"last refit {last or 'never'}{ago}"
    )
    rows = [("ITEM", "STATE", "NOW", "THRESHOLD", "CROSSING")]
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
    for row in rows:
        print("  ".join(c.ljust(w) for c, w in zip(row[:4], widths)) + "  " + row[4])
    print(
        "Forecasts support decisions; local codes and the site's own procedures decide limits "
        "and actions."
    )
    return 0
