"""``kind = "exec"``: run a program with the alert as JSON on stdin and as environment variables.

The command is a list, run directly (never through a shell).  Each scalar field of the alert is
also in the environment as ``THERMETA_<FIELD>`` (e.g. ``THERMETA_ITEM``, ``THERMETA_EVENT``,
``THERMETA_SENTENCE``).  A non-zero exit or running past ``timeout`` is a failed delivery.
"""

from __future__ import annotations

import json
import os
import subprocess
from typing import Annotated, Any, Literal

from pydantic import AfterValidator, BeforeValidator
from thermeta.daemon.alerts.hooks.base import Hook, TimedHookConfig
from thermeta.daemon.settings.checks import Texts, problem
from thermeta.storage.errors import DeliveryError


def _no_shell(v: Any) -> Any:
    if isinstance(v, str):
        raise problem('must be a list such as ["/usr/local/bin/prog", "arg"] (no shell is used)')
    return v


def _not_empty(v: tuple[str, ...]) -> tuple[str, ...]:
    if not v:
        raise problem("must not be empty")
    return v


class ExecConfig(TimedHookConfig):
    """``[[hook]]`` with ``kind = "exec"``."""

    kind: Literal["exec"] = "exec"
    command: Annotated[Texts, BeforeValidator(_no_shell), AfterValidator(_not_empty)]


def alert_env(alert: dict[str, Any]) -> dict[str, str]:
    out = {}
    for k, v in alert.items():
        if isinstance(v, (dict, list)) or v is None:
            continue
        out["THERMETA_" + k.upper()] = str(v).lower() if isinstance(v, bool) else str(v)
    return out


class ExecHook(Hook[ExecConfig]):
    kind = "exec"
    config = ExecConfig

    def deliver(self, alert: dict[str, Any]) -> None:
        env = dict(os.environ)
        env.update(alert_env(alert))
        cmd = list(self.cfg.command)
        try:
            proc = subprocess.run(
                cmd,
                input=json.dumps(alert).encode(),
                env=env,
                shell=False,
                capture_output=True,
                timeout=self.cfg.timeout_s,
                check=False,
            )
        except subprocess.TimeoutExpired as exc:
            raise DeliveryError(
                f"{self.key}: {cmd[0]} ran past its {self.cfg.timeout_s:g} s "
                "timeout and was stopped"
            ) from exc
        except OSError as exc:
            raise DeliveryError(f"{self.key}: cannot run {cmd[0]}: {exc.strerror or exc}") from exc
        if proc.returncode != 0:
            err = proc.stderr.decode(errors="replace").strip().splitlines()
            raise DeliveryError(
                f"{self.key}: {cmd[0]} exited with {proc.returncode}"
                + (f": {err[-1][:200]}" if err else "")
            )
