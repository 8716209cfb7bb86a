"""The ``thermeta`` command line: one sub-command per module, imported only when used.

Each command module exposes ``add_arguments(parser)`` and ``run(args) -> int`` (the exit code,
one of :data:`EXIT_CODES`).
"""

from __future__ import annotations

import argparse
import importlib
import os
import re
import sys

# name -> (module, one-line help)
COMMANDS: dict[str, tuple[str, str]] = {
    "forecast": ("thermeta.daemon.cli.forecast", "forecast a threshold crossing from a CSV file"),
    "run": ("thermeta.daemon.cli.run", "run the service: MQTT ingest, refits, forecasts, alerts"),
    "check-config": ("thermeta.daemon.cli.check_config", "validate a config file and exit"),
    "status": ("thermeta.daemon.cli.status", "counts and health read from the store"),
    "readings": ("thermeta.daemon.cli.readings", "export an item's stored readings as CSV"),
    "ack": ("thermeta.daemon.cli.ack", "acknowledge an item's open incident (stops reminders)"),
    "start": ("thermeta.daemon.cli.start", "open an episode of an item (a batch, a trip, a run)"),
    "end": ("thermeta.daemon.cli.end", "close an item's open episode"),
    "report": (
        "thermeta.daemon.cli.report",
        "an item's record (an episode or a span) as PDF, CSV or JSON",
    ),
    "watch": ("thermeta.daemon.cli.watch", "live terminal dashboard beside a running service"),
    "plot": ("thermeta.daemon.cli.plot", "draw an item's readings and forecast to a PNG"),
    "simulate": ("thermeta.daemon.cli.simulate", "publish a simulated scenario over MQTT"),
    "demo": ("thermeta.daemon.cli.demo", "the whole product on simulated data, in one command"),
    "upgrade-store": (
        "thermeta.daemon.cli.upgrade_store",
        "rebuild a store made by an older thermeta in the present layout",
    ),
}


# Every exit code a command returns, and what it means (the README's table is this one).
EXIT_CODES: dict[int, str] = {
    0: "done",
    1: "could not be done as things stand: the store could not be opened or holds nothing "
    "for it yet, the service could not start, nothing to act on (ack with no open incident, "
    "end with no open episode, plot with no readings)",
    2: "a bad config, argument or input file (each problem named as FILE:LINE: key: problem)",
    130: "interrupted (Ctrl-C)",
    141: "the output was closed early (a pipe into head)",
}


def version() -> str:
    from importlib.metadata import PackageNotFoundError
    from importlib.metadata import version as dist_version

    try:
        return dist_version("thermeta")
    except PackageNotFoundError:
        return "unknown (not installed)"


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="thermeta",
        description="Forecast when warming or cooling items will cross their temperature limits.",
        epilog="exit codes: "
        + "; ".join(f"{code} {re.split(r': | [(]', text)[0]}" for code, text in EXIT_CODES.items()),
    )
    parser.add_argument("--version", action="version", version=f"thermeta {version()}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    for name, (module_name, help_text) in COMMANDS.items():
        p = sub.add_parser(name, help=help_text, description=help_text)
        try:
            module = importlib.import_module(module_name)
        except ModuleNotFoundError as exc:
            if exc.name != module_name:
                raise
            p.set_defaults(_missing=name)
            continue
        module.add_arguments(p)
        p.set_defaults(_run=module.run)
    return parser


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if args.command is None:
        parser.print_help()
        return 2
    if getattr(args, "_missing", None):
        print(
            f"thermeta: the '{args._missing}' command is not available in this build",
            file=sys.stderr,
        )
        return 2
    try:
        return int(args._run(args) or 0)
    except KeyboardInterrupt:
        return 130
    except BrokenPipeError:
        # the reader went away (`thermeta forecast ... | head`): stop quietly, as a filter
        # does; stdout is pointed at devnull so the interpreter's final flush cannot fail again
        # (the Python docs' recipe for SIGPIPE, library/signal.html)
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return 141  # 128 + SIGPIPE, what a shell reports for a filter cut off


if __name__ == "__main__":
    sys.exit(main())
