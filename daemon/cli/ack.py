"""``thermeta ack ITEM --config FILE [--by NAME] [--note TEXT]``: acknowledge an item's open
incident (its warnings since the first one, until no level needs attention).  Reminders for it
stop; the acknowledgement is recorded in the store (who, when, why) and the next incident alerts
as usual.  Works while the daemon runs."""

from __future__ import annotations

import argparse
import getpass
import sys
import time


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("item", metavar="ITEM", help="the item whose open incident to acknowledge")
    p.add_argument("--config", required=True, metavar="FILE", help="the TOML config")
    p.add_argument("--by", metavar="NAME", help="who acknowledges (default: the login name)")
    p.add_argument("--note", metavar="TEXT", help="why, or what is being done")


def run(args: argparse.Namespace) -> int:
    from thermeta.daemon.alerts.message import clock
    from thermeta.daemon.alerts.rules import ItemAlertState
    from thermeta.daemon.cli.common import load_config_or_report, open_store
    from thermeta.storage.alerts import AlertStore

    cfg = load_config_or_report(args.config)
    if cfg is None:
        return 2
    store = open_store(cfg, "ack")
    if store is None:
        return 1
    try:
        store.create_all()
        astore = AlertStore(store)
        raw = astore.get_state(args.item)
        if raw is None:
            known = sorted(astore.load_states())
            hint = f" (items with alert history: {', '.join(known[:10])})" if known else ""
            print(f"thermeta ack: no alerts recorded for item {args.item!r}{hint}", file=sys.stderr)
            return 2
        st = ItemAlertState.from_json(raw)
        if not st.incident_open or not st.incident:
            print(
                f"thermeta ack: {args.item} has no open incident; nothing to acknowledge",
                file=sys.stderr,
            )
            return 1
        incident = st.incident
        earlier = astore.ack_of(args.item, incident)
        if earlier is not None:
            print(
                f"{args.item}: incident {incident} was already acknowledged by "
                f"{earlier['by'] or 'someone'} at {clock(earlier['acked_at'])}"
            )
            return 0
        by = args.by or _login()
        now = time.time()
        astore.add_ack(args.item, incident, now, by, args.note)
        states = ", ".join(f"{k} {v}" for k, v in st.open_states.items()) or "open"
        print(
            f"{args.item}: incident {incident} ({states}) acknowledged by {by} at "
            f"{clock(now)}; reminders stop until it clears"
        )
        return 0
    finally:
        store.close()


def _login() -> str:
    try:
        return getpass.getuser()
    except (KeyError, OSError):
        return "unknown"
