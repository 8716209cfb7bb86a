"""Shared steps of the commands that read a config and the store."""

from __future__ import annotations

import sys
from typing import Any


def load_config_or_report(path: str) -> Any:
    """The validated config, or None after printing each problem as ``FILE:LINE: key: problem``."""
    from thermeta.daemon.config import load_config
    from thermeta.daemon.errors import ConfigError

    try:
        return load_config(path)
    except ConfigError as exc:
        for line in exc.problems:
            print(line, file=sys.stderr)
        return None


def open_store(cfg: Any, command: str):
    """The config's store, or None after printing why it cannot be read."""
    from sqlalchemy import inspect
    from thermeta.storage.store import Store, StoreError, safe_url

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
        if not inspect(store.engine).has_table("readings"):
            print(f"thermeta {command}: {safe_url(url)} holds no thermeta tables", file=sys.stderr)
            return None
    except (StoreError, Exception) as exc:  # noqa: BLE001 - driver errors vary by database
        print(
            f"thermeta {command}: cannot open {safe_url(url)}: {str(exc).splitlines()[0]}",
            file=sys.stderr,
        )
        return None
    return store
