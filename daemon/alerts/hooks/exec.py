"""``kind = "exec"``: run a program with the alert as JSON on stdin and as environment variables.

The command is a list, run directly (never through a shell).  Each scalar field of the alert is
also in the environment as ``THERMETA_<FIELD>`` (e.g. ``THERMETA_ITEM``, ``THERMETA_EVENT``,
``THERMETA_SENTENCE``).  A non-zero exit or running past ``timeout`` is a failed delivery.

The program gets a minimal environment, never the daemon's own (which holds the broker's and the
store's passwords and the webhook token): ``PATH``, ``LANG``, ``LC_ALL``, ``TZ`` and ``HOME``
where set, the alert's ``THERMETA_*`` variables, and the variables the hook's ``env`` names.
It runs in a process group of its own; at the timeout the whole group is ended, so whatever
the program started (a ``sleep`` in a script) goes with it.
"""

from __future__ import annotations

import json
import os
import re
import signal
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


def _env_names(v: tuple[str, ...]) -> tuple[str, ...]:
    for name in v:
        if not ENV_NAME_RE.fullmatch(name):
            raise problem("must list environment variable names such as TICKET_QUEUE")
        if name.startswith(ALERT_PREFIX):
            raise problem(f"{ALERT_PREFIX}* variables are the alert's own; name others")
    return v


ENV_NAME_RE = re.compile(r"[A-Za-z_][A-Za-z0-9_]*")
ALERT_PREFIX = "THERMETA_"  # the alert's fields; the daemon's secrets are never passed on
BASE_ENV = ("PATH", "LANG", "LC_ALL", "TZ", "HOME")


class ExecConfig(TimedHookConfig):
    """``[[hook]]`` with ``kind = "exec"``."""

    kind: Literal["exec"] = "exec"
    command: Annotated[Texts, BeforeValidator(_no_shell), AfterValidator(_not_empty)]
    env: Annotated[Texts, AfterValidator(_env_names)] = ()  # variables passed on to the program


def alert_env(alert: dict[str, Any]) -> dict[str, str]:
    out = {}
    for k, v in alert.items():
        if isinstance(v, (dict, list)) or v is None:
            continue
        out[ALERT_PREFIX + k.upper()] = str(v).lower() if isinstance(v, bool) else str(v)
    return out


class ExecHook(Hook[ExecConfig]):
    kind = "exec"
    config = ExecConfig

    def environment(self, alert: dict[str, Any]) -> dict[str, str]:
        """The program's environment: the minimum, the named variables, the alert's fields."""
        env = {k: os.environ[k] for k in (*BASE_ENV, *self.cfg.env) if k in os.environ}
        env.setdefault("PATH", os.defpath)
        env.update(alert_env(alert))
        return env

    def deliver(self, alert: dict[str, Any]) -> None:
        cmd = list(self.cfg.command)
        try:
            proc = subprocess.Popen(
                cmd,
                stdin=subprocess.PIPE,
                stdout=subprocess.PIPE,
                stderr=subprocess.PIPE,
                env=self.environment(alert),
                shell=False,
                start_new_session=True,  # its own process group, ended as a whole below
            )
        except OSError as exc:
            raise DeliveryError(f"{self.key}: cannot run {cmd[0]}: {exc.strerror or exc}") from exc
        try:
            _, stderr = proc.communicate(json.dumps(alert).encode(), timeout=self.cfg.timeout_s)
        except subprocess.TimeoutExpired as exc:
            _end_group(proc)
            raise DeliveryError(
                f"{self.key}: {cmd[0]} ran past its {self.cfg.timeout_s:g} s "
                "timeout and was stopped"
            ) from exc
        finally:
            if proc.returncode is None:
                _end_group(proc)
        if proc.returncode != 0:
            err = stderr.decode(errors="replace").strip().splitlines()
            raise DeliveryError(
                f"{self.key}: {cmd[0]} exited with {proc.returncode}"
                + (f": {err[-1][:200]}" if err else "")
            )


def _end_group(proc: subprocess.Popen[bytes]) -> None:
    """Kill the program's process group (the program and all it started) and reap it."""
    try:
        os.killpg(proc.pid, signal.SIGKILL)
    except (ProcessLookupError, PermissionError):
        pass
    try:
        proc.communicate(timeout=5)
    except subprocess.TimeoutExpired:  # a grandchild that left the group still holds a pipe
        proc.kill()
        proc.wait()
