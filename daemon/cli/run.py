"""``thermeta run --config FILE``: the service in the foreground until SIGINT or SIGTERM."""

from __future__ import annotations

import argparse


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("--config", required=True, metavar="FILE", help="the TOML config")
    p.add_argument("--log-json", action="store_true", help="log JSON lines instead of text")
    p.add_argument(
        "--log-level", choices=["debug", "info", "warning", "error"], help="overrides [log] level"
    )
    p.add_argument(
        "--dashboard",
        action="store_true",
        help="show the live dashboard in this terminal while the service runs",
    )


def run(args: argparse.Namespace) -> int:
    import logging
    import os
    import signal
    import threading

    from thermeta.daemon.cli.common import load_config_or_report
    from thermeta.daemon.logsetup import configure
    from thermeta.storage.errors import StoreError

    cfg = load_config_or_report(args.config)
    if cfg is None:
        return 2
    configure(args.log_level or cfg.log_level, json_lines=args.log_json)
    log = logging.getLogger("thermeta.run")

    from thermeta.daemon.service import AlreadyRunning, Service

    stop = threading.Event()
    in_dashboard = threading.Event()

    def on_signal(signum, _frame) -> None:
        log.info("received %s", signal.Signals(signum).name)
        stop.set()
        if in_dashboard.is_set():
            raise KeyboardInterrupt  # ends the dashboard's loop in this (main) thread

    signal.signal(signal.SIGTERM, on_signal)
    signal.signal(signal.SIGINT, on_signal)
    try:
        service = Service(cfg)
        service.start()
    except (StoreError, AlreadyRunning) as exc:
        log.error("%s", exc)
        return 1
    try:
        if args.dashboard:
            try:
                from thermeta.daemon.views.dashboard import run_foreground
            except ModuleNotFoundError:
                log.error("the dashboard is not available in this build; running without it")
            else:
                in_dashboard.set()
                try:
                    run_foreground(service)  # blocks until the user quits
                except KeyboardInterrupt:
                    pass
                finally:
                    in_dashboard.clear()
                stop.set()
        while not stop.is_set():
            stop.wait(1.0)
    finally:
        service.stop()
    busy = service.busy()
    if busy:
        # A refit or store call still blocked (a locked store waits out its timeout), which the
        # interpreter would wait for at exit: everything committed is acknowledged and the rest
        # is the broker's to send again, so do not wait.
        log.warning("exiting while %s is still busy", busy)
        logging.shutdown()
        os._exit(0)
    return 0
