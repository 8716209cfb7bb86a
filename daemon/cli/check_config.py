"""``thermeta check-config FILE``: validate a config file and exit (0 good, 2 with its problems)."""

from __future__ import annotations

import argparse


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("config", metavar="FILE", help="the TOML config to check")


def run(args: argparse.Namespace) -> int:
    from thermeta.daemon.cli.common import load_config_or_report
    from thermeta.daemon.config import overrides

    cfg = load_config_or_report(args.config)
    if cfg is None:
        return 2
    for note in overrides(cfg):
        print(note)
    patterns = sum(1 for it in cfg.items if it.is_pattern)
    n = len(cfg.items)
    print(
        f"{args.config}: ok: {n} item{'s' if n != 1 else ''}"
        + (f" ({patterns} wildcard pattern{'s' if patterns != 1 else ''})" if patterns else "")
        + f", {len(cfg.hooks)} hook{'s' if len(cfg.hooks) != 1 else ''}, broker "
        f"{cfg.broker.host}:{cfg.broker.port}"
    )
    return 0
