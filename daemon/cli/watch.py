"""``thermeta watch --config FILE``: the live dashboard in its own process, reading the store
beside a running daemon (SQLite in WAL mode lets readers in without blocking the writer).
When stdout is not a terminal it prints plain lines every ``--interval`` seconds instead."""

from __future__ import annotations

import argparse
import sys


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("--config", required=True, metavar="FILE", help="the TOML config")
    p.add_argument(
        "--interval",
        type=float,
        default=2.0,
        metavar="S",
        help="seconds between frames (default 2)",
    )
    p.add_argument("--once", action="store_true", help="print one plain frame and exit")


def run(args: argparse.Namespace) -> int:
    from rich.console import Console
    from thermeta.daemon.cli.common import load_config_or_report, open_store
    from thermeta.daemon.views.dashboard import watch

    if not args.interval > 0:
        print(f"thermeta watch: --interval must be > 0, got {args.interval:g}", file=sys.stderr)
        return 2
    cfg = load_config_or_report(args.config)
    if cfg is None:
        return 2
    store = open_store(cfg, "watch")
    if store is None:
        return 1
    try:
        return watch(store, Console(), refresh_s=args.interval, once=args.once)
    except KeyboardInterrupt:
        return 0
    finally:
        store.close()
