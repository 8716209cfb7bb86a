"""``thermeta end ITEM --config FILE [--at TIME]``: close an item's open episode (see
``thermeta start``).  Exit 1 when none is open."""

from __future__ import annotations

import argparse
import sys


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("item", metavar="ITEM", help="the item whose episode ends")
    p.add_argument("--config", required=True, metavar="FILE", help="the TOML config")
    p.add_argument(
        "--at", metavar="TIME", help="when it ended: RFC 3339 or epoch seconds (default: now)"
    )


def run(args: argparse.Namespace) -> int:
    from thermeta.daemon.alerts.message import clock
    from thermeta.daemon.cli.common import load_config_or_report, open_store
    from thermeta.daemon.cli.start import known_item, moment
    from thermeta.daemon.states import EpisodeSource
    from thermeta.storage.episodes import EpisodeStore

    try:
        at = moment(args.at)
    except ValueError as exc:
        print(f"thermeta end: --at: {exc}", file=sys.stderr)
        return 2
    cfg = load_config_or_report(args.config)
    if cfg is None:
        return 2
    store = open_store(cfg, "end")
    if store is None:
        return 1
    try:
        store.create_all()
        if not known_item(cfg, store, args.item):
            print(f"thermeta end: no item named {args.item!r} in {args.config}", file=sys.stderr)
            return 2
        eid = EpisodeStore(store).end(args.item, at, EpisodeSource.COMMAND)
    finally:
        store.close()
    if eid is None:
        print(f"thermeta end: {args.item} has no open episode", file=sys.stderr)
        return 1
    print(f"{args.item}: episode {eid} ended at {clock(at)}")
    return 0
