"""``thermeta upgrade-store --config FILE``: rebuild a store made by an older thermeta in the
present readings layout (see docs/scale.md).  Stores made now need nothing; running it on one is
harmless.  It refuses while a service runs on the store: stop the service first."""

from __future__ import annotations

import argparse
import sys
import time


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("--config", required=True, metavar="FILE", help="the TOML config")


def run(args: argparse.Namespace) -> int:
    from thermeta.daemon.cli.common import load_config_or_report, open_store
    from thermeta.daemon.service import _holder_alive
    from thermeta.storage.errors import StoreError
    from thermeta.storage.store import safe_url

    cfg = load_config_or_report(args.config)
    if cfg is None:
        return 2
    store = open_store(cfg, "upgrade-store")
    if store is None:
        return 1
    where = safe_url(cfg.storage.url)
    try:
        hb = store.get_meta("daemon") or {}
        if hb.get("state") == "running" and _holder_alive(hb, lambda: store.get_meta("daemon")):
            print(
                f"thermeta upgrade-store: a service is running on {where} (pid {hb.get('pid')} on "
                f"host {hb.get('host')}); stop it first",
                file=sys.stderr,
            )
            return 1
        store.create_all()
        if store.readings_layout() == "lean":
            print(f"{where}: readings already in the present layout; nothing to do")
            return 0
        started = time.monotonic()
        store.upgrade_readings()
        took = time.monotonic() - started
    except StoreError as exc:
        print(f"thermeta upgrade-store: {where}: {exc}", file=sys.stderr)
        return 1
    finally:
        store.close()
    print(f"{where}: readings rebuilt in the present layout in {took:.1f} s")
    return 0
