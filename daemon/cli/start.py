"""``thermeta start ITEM --config FILE [--batch NAME] [--class NAME] [--at TIME]``: open an
episode of an item (a batch, a trip, a tray run), and ``thermeta end ITEM ...`` (the ``end``
command, in ``end.py``) to close it.

Opening an episode closes the item's open one.  Deadlines given as ``within`` count from the
episode's start; the episode's record (``thermeta report``) keeps its stages, excursions and
forecasts.  Works beside the running service, which picks the episode up at its next refit."""

from __future__ import annotations

import argparse
import sys
from typing import Any


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("item", metavar="ITEM", help="the item whose episode starts")
    p.add_argument("--config", required=True, metavar="FILE", help="the TOML config")
    p.add_argument("--batch", metavar="NAME", help="the episode's name (a batch, a trip)")
    p.add_argument(
        "--class",
        dest="cls",
        metavar="NAME",
        help="the class of episode whose learned prior it uses and teaches "
        "(default: the item's prior_class, or its name)",
    )
    p.add_argument(
        "--at", metavar="TIME", help="when it started: RFC 3339 or epoch seconds (default: now)"
    )


def known_item(cfg: Any, store: Any, name: str) -> bool:
    """Whether ``name`` is an item of the config (written out, or made from a wildcard)."""
    from thermeta.daemon.ingest.topics import Router

    router = Router(cfg.items)
    if name in router.by_name:
        return True
    topics = {r["name"]: r.get("topic") for r in store.list_items("load")}
    return name in topics and router.item_for(name, topics[name]) is not None


def moment(text: str | None) -> float:
    """``--at`` as epoch seconds (now when not given); ValueError with the reason."""
    import time

    from thermeta.daemon.timefmt import parse_time

    return time.time() if text is None else parse_time(text)


def run(args: argparse.Namespace) -> int:
    from thermeta.daemon.alerts.message import clock
    from thermeta.daemon.cli.common import load_config_or_report, open_store
    from thermeta.daemon.states import EpisodeSource
    from thermeta.storage.episodes import EpisodeStore

    try:
        at = moment(args.at)
    except ValueError as exc:
        print(f"thermeta start: --at: {exc}", file=sys.stderr)
        return 2
    for key in ("batch", "cls"):
        value = getattr(args, key)
        if value is not None and not 0 < len(value.strip()) <= 200:
            flag = "--class" if key == "cls" else "--batch"
            print(f"thermeta start: {flag} must be 1-200 characters", file=sys.stderr)
            return 2
    cfg = load_config_or_report(args.config)
    if cfg is None:
        return 2
    store = open_store(cfg, "start")
    if store is None:
        return 1
    try:
        store.create_all()
        if not known_item(cfg, store, args.item):
            print(f"thermeta start: no item named {args.item!r} in {args.config}", file=sys.stderr)
            return 2
        eid = EpisodeStore(store).start(args.item, at, EpisodeSource.COMMAND, args.batch, args.cls)
    finally:
        store.close()
    named = f" ({args.batch})" if args.batch else ""
    print(f"{args.item}: episode {eid}{named} started at {clock(at)}")
    return 0
