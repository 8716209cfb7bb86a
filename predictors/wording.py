"""Temperatures in the forecast's warnings, in the unit the caller shows.

The numerics work in one unit (the daemon and the command line pass degC); a caller that shows
its readings in another unit says so with ``forecast(..., shown=DisplayUnit(...))``, and every
temperature a warning prints is converted for the call's duration:

    point (a temperature):   shown = x * scale + offset     e.g. degF = degC * 9/5 + 32
    step (a difference):     shown = x * scale              e.g. a 2.5 degC sd is 4.5 degF

With no display unit (the default) the text is what ``format(x, spec)`` gives, byte for byte.
"""

from __future__ import annotations

import math
import re
from collections.abc import Iterator
from contextlib import contextmanager
from contextvars import ContextVar
from dataclasses import dataclass


@dataclass(frozen=True)
class DisplayUnit:
    """How a temperature of the numerics is shown: x * scale + offset, followed by the symbol."""

    scale: float
    offset: float
    symbol: str

    def __post_init__(self) -> None:
        if not (math.isfinite(self.scale) and self.scale > 0 and math.isfinite(self.offset)):
            raise ValueError(
                f"a display unit needs a finite scale > 0 and a finite offset, "
                f"got scale {self.scale!r}, offset {self.offset!r}"
            )


_SHOWN: ContextVar[DisplayUnit | None] = ContextVar("thermeta_shown_unit", default=None)
# the general format with an optional sign and precision: the specs the warnings use for points
_GENERAL = re.compile(r"([+\- ]?)(?:\.(\d+))?g")


@contextmanager
def showing(unit: DisplayUnit | None) -> Iterator[None]:
    """Warnings written inside the block show temperatures in ``unit`` (None: as computed)."""
    token = _SHOWN.set(unit)
    try:
        yield
    finally:
        _SHOWN.reset(token)


def step(x: float, spec: str = "g") -> str:
    """A temperature difference (a sd, a swing, a drift) as text: scaled, no offset."""
    unit = _SHOWN.get()
    if unit is None:
        return format(x, spec)
    return f"{format(x * unit.scale, spec)} {unit.symbol}"


def point(x: float, spec: str = "g") -> str:
    """A temperature (an ambient, a mean, a level) as text: scaled and offset.

    A general format (``g``, ``.3g``) counts significant digits, which on a scale with an
    arbitrary zero stand for a resolution: 4.44 degC at ``.3g`` is to 0.01 degree, but the same
    spec would print 277.59 K as 278.  So in a display unit a point keeps the decimals the
    computed value shows at that spec (at most precision - 1, as for a value near 1), trailing
    zeros dropped as ``g`` drops them.
    """
    unit = _SHOWN.get()
    if unit is None:
        return format(x, spec)
    shown = x * unit.scale + unit.offset
    m = _GENERAL.fullmatch(spec)
    if m is None or not (math.isfinite(x) and math.isfinite(shown)):
        return f"{format(shown, spec)} {unit.symbol}"
    sign, digits = m.group(1), int(m.group(2) or 6)
    digits = max(digits, 1)
    magnitude = math.floor(math.log10(abs(x))) if x != 0 else 0
    decimals = min(max(digits - 1 - magnitude, 0), digits - 1)
    text = format(shown, f"{sign}.{decimals}f")
    if "." in text:
        text = text.rstrip("0").rstrip(".")
    if float(text) == 0:
        text = format(0.0, f"{sign}.0f")  # no "-0" from rounding a small negative value
    return f"{text} {unit.symbol}"
