"""Temperature units: values are stored canonically in degrees Celsius."""

from __future__ import annotations

UNITS = ("C", "F", "K")


def to_celsius(value: float, unit: str) -> float:
    # degC = (degF - 32) * 5/9 ;  degC = K - 273.15
    if unit == "C":
        return float(value)
    if unit == "F":
        return (float(value) - 32.0) * 5.0 / 9.0
    if unit == "K":
        return float(value) - 273.15
    raise ValueError(f"unit must be one of {', '.join(UNITS)}, got {unit!r}")


def from_celsius(value_c: float, unit: str) -> float:
    if unit == "C":
        return float(value_c)
    if unit == "F":
        return float(value_c) * 9.0 / 5.0 + 32.0
    if unit == "K":
        return float(value_c) + 273.15
    raise ValueError(f"unit must be one of {', '.join(UNITS)}, got {unit!r}")


def scale_from_celsius(delta_c: float, unit: str) -> float:
    """A temperature difference (not a point): K and degC steps are equal, degF steps 5/9 as big."""
    if unit not in UNITS:
        raise ValueError(f"unit must be one of {', '.join(UNITS)}, got {unit!r}")
    return float(delta_c) * (9.0 / 5.0 if unit == "F" else 1.0)


def scale_to_celsius(delta: float, unit: str) -> float:
    """A temperature difference in ``unit`` in degC steps (the inverse of scale_from_celsius)."""
    return float(delta) / scale_from_celsius(1.0, unit)
