"""thermeta's exceptions, one tree:

ThermetaError
├── InputError        bad user input: a CSV, a payload, an argument (exit code 2)
│   └── ConfigError   a config file problem, reported as FILE:LINE: key: problem
├── StoreError        the store could not be opened or written
└── DeliveryError     an alert hook failed to deliver (retried by the outbox)
"""

from __future__ import annotations


class ThermetaError(Exception):
    """Root of thermeta's own errors."""


class InputError(ThermetaError):
    """Bad input from a user: one line, naming what and where."""


class ConfigError(InputError):
    """One or more config problems; ``problems`` holds the lines ``FILE:LINE: key: problem``."""

    def __init__(self, problems: list[str]):
        self.problems = list(problems)
        super().__init__("\n".join(self.problems))


class StoreError(ThermetaError):
    """The store failed."""


class DeliveryError(ThermetaError):
    """An alert hook could not deliver; the outbox retries it."""
