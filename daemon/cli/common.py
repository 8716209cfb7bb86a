"""Shared steps of the commands that read a config and the store."""

from __future__ import annotations

import sys
from typing import TYPE_CHECKING

if TYPE_CHECKING:  # the commands import these only when they run
    from thermeta.daemon.config import Config
    from thermeta.storage.store import Store


def load_config_or_report(path: str) -> Config | None:
    """The validated config, or None after printing each problem as ``FILE:LINE: key: problem``."""
    from thermeta.daemon.config import load_config
    from thermeta.daemon.timefmt import use_zone
    from thermeta.storage.errors import ConfigError

    try:
        cfg = load_config(path)
    except ConfigError as exc:
        for line in exc.problems:
            print(line, file=sys.stderr)
        return None
    use_zone(cfg.timezone)  # every clock time the command prints is in the site's zone
    return cfg


def open_store(cfg: Config, command: str) -> Store | None:
    """The config's store, or None after printing why it cannot be read."""
    from thermeta.storage.errors import StoreError
    from thermeta.storage.store import Store, safe_url

    url = cfg.storage.url
    if url.startswith("sqlite:///") and url != "sqlite:///:memory:":
        from pathlib import Path

        if not Path(url[len("sqlite:///") :]).exists():
            print(
                f"thermeta {command}: no store at {safe_url(url)} yet (has `thermeta run` started "
                "with this config?)",
                file=sys.stderr,
            )
            return None
    try:
        store = Store(url)
        if not store.has_table():
            print(f"thermeta {command}: {safe_url(url)} holds no thermeta tables", file=sys.stderr)
            return None
    except StoreError as exc:
        why = exc.__cause__ or exc  # the database's own words, as they came
        print(
            f"thermeta {command}: cannot open {safe_url(url)}: {str(why).splitlines()[0]}",
            file=sys.stderr,
        )
        return None
    return store
