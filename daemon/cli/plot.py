"""``thermeta plot ITEM --config FILE --out FILE.png``: an item's recent readings and forecast as a
picture, read from the store (works beside a running daemon)."""

from __future__ import annotations

import argparse
import sys


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("item", metavar="ITEM", help="the item's name (as in thermeta status)")
    p.add_argument("--config", required=True, metavar="FILE", help="the TOML config")
    p.add_argument("--out", required=True, metavar="FILE.png", help="where to write the PNG")
    p.add_argument(
        "--hours",
        type=float,
        metavar="H",
        help="history to show, in hours before the newest reading (default: the item's fit window)",
    )


def run(args: argparse.Namespace) -> int:
    from thermeta.daemon.cli.common import load_config_or_report, open_store
    from thermeta.daemon.ingest.topics import Router
    from thermeta.daemon.views.plotting import figure_png, item_figure

    if args.hours is not None and not args.hours > 0:
        print(f"thermeta plot: --hours must be positive, got {args.hours:g}", file=sys.stderr)
        return 2
    if not args.out.lower().endswith(".png"):
        print(
            f"thermeta plot: --out {args.out}: the picture is a PNG; name it *.png", file=sys.stderr
        )
        return 2
    cfg = load_config_or_report(args.config)
    if cfg is None:
        return 2
    store = open_store(cfg, "plot")
    if store is None:
        return 1
    try:
        known = {row["name"]: row for row in store.list_items(kind=None)}
        row = known.get(args.item)
        item = Router(cfg.items).item_for(args.item, row["topic"] if row else None)
        if item is None:
            names = (
                ", ".join(sorted(n for n, r in known.items() if r["kind"] == "load")) or "none yet"
            )
            print(
                f"thermeta plot: no item named {args.item!r} in {args.config} and the store "
                f"(items: {names})",
                file=sys.stderr,
            )
            return 2
        fig = item_figure(store, item, history_s=None if args.hours is None else args.hours * 3600)
    finally:
        store.close()
    if fig is None:
        print(f"thermeta plot: no readings stored for {args.item} yet", file=sys.stderr)
        return 1
    try:
        with open(args.out, "wb") as f:
            f.write(figure_png(fig))
    except OSError as exc:
        print(f"thermeta plot: {args.out}: cannot write: {exc.strerror or exc}", file=sys.stderr)
        return 2
    print(f"{args.item}: picture written to {args.out}")
    return 0
