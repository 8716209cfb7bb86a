"""Single key presses from a terminal, without echo or Enter (termios cbreak mode), for the
dashboard; restores the terminal on exit."""

from __future__ import annotations

import os
import select
import sys
from typing import IO, Any


class KeyReader:
    def __init__(self, stream: IO[str] | None = None):
        self.stream = stream or sys.stdin
        self.fd: int | None = None
        self._saved: Any = None
        self._pending = ""

    def __enter__(self) -> KeyReader:
        try:
            import termios
            import tty

            fd = self.stream.fileno()
            if os.isatty(fd):
                self._saved = termios.tcgetattr(fd)
                tty.setcbreak(fd)
                self.fd = fd
        except (ImportError, OSError, ValueError):
            self.fd = None
        return self

    def __exit__(self, *exc: object) -> None:
        if self.fd is not None and self._saved is not None:
            import termios

            termios.tcsetattr(self.fd, termios.TCSADRAIN, self._saved)

    def read(self, timeout_s: float) -> str | None:
        """One key, or None after ``timeout_s``."""
        if self._pending:
            key, self._pending = self._pending[0], self._pending[1:]
            return key
        if self.fd is None:
            import time

            time.sleep(timeout_s)
            return None
        ready, _, _ = select.select([self.fd], [], [], timeout_s)
        if not ready:
            return None
        data = os.read(self.fd, 64).decode(errors="replace")
        if not data:
            return None
        # Keys typed (or pasted) together arrive in one read: hand them out one by one.
        self._pending = data[1:]
        return data[0]
