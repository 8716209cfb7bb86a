"""thermeta's exceptions: one tree, every error the program raises on purpose.

    ThermetaError
    ├── InputError        bad input, one line naming what and where (commands exit with 2)
    │   ├── ConfigError   config problems, each as FILE:LINE: key: problem
    │   └── PayloadError  a message that holds no storable reading (it becomes a dead letter)
    ├── StoreError        the store could not be opened, created, read or written
    │   └── StoreRefused  the store refused the data itself (too long, a constraint): retrying
    │                     the same rows cannot help, so the writer sets them aside
    └── DeliveryError     an alert hook could not deliver (the outbox tries again later)

Library errors are translated where they happen, with ``raise ... from exc``: SQLAlchemy's in
:func:`thermeta.storage.store.store_errors` (the one place), a hook's network and process errors
in its own ``deliver``.  The numerics (``predictors/``) raise plain ``ValueError`` for bad
arguments and report a failed fit as a result, so they need nothing from here.

The tree lives in ``storage/`` because that is the lowest layer raising thermeta's own errors:
``daemon/`` imports ``storage/``, never the other way round, so both can import this module and
the layering holds.
"""

from __future__ import annotations


class ThermetaError(Exception):
    """Root of thermeta's own errors."""


class InputError(ThermetaError):
    """Bad input: one line, naming what and where."""


class ConfigError(InputError):
    """One or more config problems; ``problems`` holds the lines ``FILE:LINE: key: problem``."""

    def __init__(self, problems: list[str]):
        self.problems = list(problems)
        super().__init__("\n".join(self.problems))


class PayloadError(InputError):
    """A message's payload holds no reading that can be stored; the message is the reason."""


class StoreError(ThermetaError):
    """The store failed; the message is safe to show (passwords masked)."""


class StoreRefused(StoreError):
    """The store refused the data (a value too long, a constraint, a trigger): the same
    statement fails again however often it is tried, unlike a lost connection or a lock."""


class DeliveryError(ThermetaError):
    """An alert hook could not deliver; the outbox retries it."""
