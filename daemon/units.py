"""Temperature units: values are stored canonically in degrees Celsius."""

from __future__ import annotations

from typing import TYPE_CHECKING, Any, Literal, get_args

if TYPE_CHECKING:  # the predictors (numpy, scipy) load only when a forecast is made
    from thermeta.predictors.wording import DisplayUnit

Unit = Literal["C", "F", "K"]
UNITS: tuple[Unit, ...] = get_args(Unit)
UNIT_SIGN = {"C": "°C", "F": "°F", "K": "K"}  # as the command line, alerts and dashboard print
# temperatures in a forecast's dict: points (converted with the offset) and differences (scaled)
POINT_KEYS = ("threshold", "ambient", "ambient_lo", "ambient_hi", "value_now", "ambient_given")
DELTA_KEYS = ("rmse",)


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


def to_item_units(d: dict[str, Any], unit: str) -> dict[str, Any]:
    """Temperatures of a forecast dict from degC to ``unit`` (points and differences)."""
    if unit == "C":
        return d
    out = dict(d)
    for k in POINT_KEYS:
        if out.get(k) is not None:
            out[k] = from_celsius(out[k], unit)
    for k in DELTA_KEYS:
        if out.get(k) is not None:
            out[k] = scale_from_celsius(out[k], unit)
    return out


def shown_in(unit: str) -> DisplayUnit:
    """How the forecast's warnings show their degC temperatures in ``unit``, with its sign (the
    predictors' own text has none, so a degC item gets the identity scale and its sign too)."""
    from thermeta.predictors.wording import DisplayUnit

    # from_celsius is a straight line: x * scale + offset
    return DisplayUnit(
        scale=scale_from_celsius(1.0, unit), offset=from_celsius(0.0, unit), symbol=UNIT_SIGN[unit]
    )
