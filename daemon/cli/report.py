"""``thermeta report ITEM --config FILE [--episode ID | --since T --until T] --out FILE``: an
item's record as PDF, CSV or JSON (by the file's ending).

Without ``--episode`` or a span, the item's newest episode; without an episode, its last rolling
``period``.  The record holds the readings, each level's outcome (stage times made or missed),
the time and degree-minutes beyond each limit, budgets used, the mean kinetic temperature, the
forecast history and how it turned out, the alerts and acknowledgements, and the caution that it
supports a decision and is not a regulatory record.  Works beside the running service."""

from __future__ import annotations

import argparse
import csv
import json
import sys
from pathlib import Path
from typing import Any

FORMS = (".pdf", ".csv", ".json")


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("item", metavar="ITEM", help="the item")
    p.add_argument("--config", required=True, metavar="FILE", help="the TOML config")
    p.add_argument("--episode", type=int, metavar="ID", help="one episode (see thermeta status)")
    p.add_argument(
        "--since",
        metavar="TIME",
        help="start of the span: RFC 3339, epoch seconds, or a date (YYYY-MM-DD: that day's "
        "start in the site's zone)",
    )
    p.add_argument(
        "--until", metavar="TIME", help="end of the span (a date: its end; default: now)"
    )
    p.add_argument("--out", required=True, metavar="FILE", help="FILE.pdf, FILE.csv or FILE.json")


def write_csv(rec: Any, path: str) -> None:
    """One row per fact: ``record,time,name,value,detail`` (times RFC 3339 UTC, temperatures
    in the item's unit, durations in seconds)."""
    from thermeta.predictors.result import rfc3339

    with open(path, "w", newline="", encoding="utf-8") as f:
        w = csv.writer(f)
        w.writerow(["record", "time", "name", "value", "detail"])
        w.writerow(["caution", "", "", "", rec.caution])
        w.writerow(["item", rfc3339(rec.made_at), rec.item, rec.unit, rec.site or ""])
        w.writerow(["span", rfc3339(rec.since), "since", "", ""])
        w.writerow(["span", rfc3339(rec.until), "until", "", ""])
        if rec.episode:
            e = rec.episode
            w.writerow(["episode", e["started_at"], e["batch"] or "", e["id"], e["started_by"]])
        for d in rec.levels:
            w.writerow(["level", "", d["name"], d["threshold"], f"{d['kind']} {d['side'] or '?'}"])
            if d["first_passed_at"]:
                w.writerow(["passed", d["first_passed_at"], d["name"], d["threshold"], ""])
            if d["deadline_at"]:
                made = {True: "made", False: "missed", None: "open"}[d.get("made")]
                w.writerow(["deadline", d["deadline_at"], d["name"], "", made])
            if "beyond_s" in d:
                w.writerow(["beyond", "", d["name"], d["beyond_s"], "seconds"])
                w.writerow(["beyond", "", d["name"], d["degree_minutes"], "degree-minutes"])
            if d.get("budget"):
                b = d["budget"]
                w.writerow(["budget", "", d["name"], b["used_s"], f"of {b['allowed_s']} s used"])
        w.writerow(["mkt", "", rec.item, "" if rec.mkt is None else round(rec.mkt, 3), ""])
        for r in rec.forecasts:
            w.writerow(
                [
                    "forecast",
                    r["made_at"],
                    r["level"],
                    r["forecast_at"] or "",
                    f"{r['state']} 90 % {r['lo_at'] or '-'} to {r['hi_at'] or 'open'}; "
                    f"actual {r['actual_at'] or '-'}",
                ]
            )
        for a in rec.alerts:
            w.writerow(["alert", a["at"], a["event"], a["level"] or "", a["sentence"]])
        for k in rec.acks:
            w.writerow(["ack", k["at"], k["by"] or "", k["incident"], k["note"] or ""])
        for t, v in rec.readings:
            w.writerow(["reading", rfc3339(t), rec.item, round(v, 3), ""])


def run(args: argparse.Namespace) -> int:
    import time

    from thermeta.daemon.cli.common import load_config_or_report, open_store
    from thermeta.daemon.timefmt import parse_since
    from thermeta.daemon.views.record import gather
    from thermeta.storage.errors import InputError

    form = Path(args.out).suffix.lower()
    if form not in FORMS:
        print(
            f"thermeta report: --out must end in {', '.join(FORMS)}, got {args.out}",
            file=sys.stderr,
        )
        return 2
    if args.episode is not None and (args.since or args.until):
        print("thermeta report: give --episode or --since/--until, not both", file=sys.stderr)
        return 2
    cfg = load_config_or_report(args.config)  # first: a date in --since is in the site's zone
    if cfg is None:
        return 2
    span: dict[str, float | None] = {}
    for key in ("since", "until"):
        text = getattr(args, key)
        try:
            span[key] = None if text is None else parse_since(text, end=key == "until")
        except ValueError as exc:
            print(f"thermeta report: --{key}: {exc}", file=sys.stderr)
            return 2
    store = open_store(cfg, "report")
    if store is None:
        return 1
    try:
        store.create_all()
        rec = gather(cfg, store, args.item, now=time.time(), episode_id=args.episode, **span)
    except InputError as exc:
        print(f"thermeta report: {exc}", file=sys.stderr)
        return 2
    finally:
        store.close()
    try:
        if form == ".json":
            Path(args.out).write_text(json.dumps(rec.to_json(), indent=1), encoding="utf-8")
        elif form == ".csv":
            write_csv(rec, args.out)
        else:
            from thermeta.daemon.views.report_pdf import write_pdf

            write_pdf(rec, args.out)
    except OSError as exc:
        print(f"thermeta report: {args.out}: {exc.strerror or exc}", file=sys.stderr)
        return 1
    from thermeta.daemon.timefmt import local_clock

    print(
        f"{args.item}: record from {local_clock(rec.since, True)} to "
        f"{local_clock(rec.until, True)} written to {args.out}"
    )
    return 0
