"""``thermeta readings ITEM --config FILE [--since RFC3339]``: an item's stored readings as CSV
(``time,value``, RFC 3339 UTC, in the item's unit), readable by ``thermeta forecast``."""

from __future__ import annotations

import argparse
import sys


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("item", metavar="ITEM", help="the item's name (as in thermeta status)")
    p.add_argument("--config", required=True, metavar="FILE", help="the TOML config")
    p.add_argument(
        "--since",
        metavar="TIME",
        help="only readings at or after this time: RFC 3339, epoch seconds, or a date "
        "(YYYY-MM-DD: that day's start in the site's zone)",
    )
    p.add_argument(
        "--until", metavar="TIME", help="only readings at or before this time (a date: its end)"
    )
    p.add_argument(
        "--unit", choices=["C", "F", "K"], help="unit of the values (default: the item's)"
    )
    p.add_argument("-o", "--output", metavar="OUT.csv", help="write to a file instead of stdout")


def run(args: argparse.Namespace) -> int:
    from thermeta.daemon.cli.common import load_config_or_report, open_store
    from thermeta.daemon.timefmt import parse_since
    from thermeta.daemon.units import from_celsius
    from thermeta.predictors.result import rfc3339

    cfg = load_config_or_report(args.config)
    if cfg is None:
        return 2
    bounds = {}
    for key in ("since", "until"):
        text = getattr(args, key)
        if text is not None:
            try:
                bounds[key] = parse_since(text, end=key == "until")
            except ValueError as exc:
                print(f"thermeta readings: --{key}: {exc}", file=sys.stderr)
                return 2
    store = open_store(cfg, "readings")
    if store is None:
        return 1
    try:
        known = {row["name"]: row for row in store.list_items(kind=None)}
        row = known.get(args.item)
        if row is None:
            names = ", ".join(n for n, r in known.items() if r["kind"] == "load") or "none yet"
            print(
                f"thermeta readings: no item named {args.item!r} in the store (items: {names})",
                file=sys.stderr,
            )
            return 2
        unit = args.unit or row["unit"] or "C"
        rows = store.recent_readings(
            row["id"], since_ts=bounds.get("since"), until_ts=bounds.get("until")
        )
    finally:
        store.close()
    out = open(args.output, "w", newline="") if args.output else sys.stdout
    try:
        out.write("time,value\n")
        for ts, value_c in rows:
            out.write(f"{rfc3339(ts)},{from_celsius(value_c, unit):.10g}\n")
        out.flush()
    except BrokenPipeError:
        # The reader (e.g. `head`) went away; that is not an error of ours.
        import os

        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
    finally:
        if args.output:
            out.close()
    if args.output:
        print(
            f"{len(rows)} readings of {args.item} ({unit}) written to {args.output}",
            file=sys.stderr,
        )
    return 0
