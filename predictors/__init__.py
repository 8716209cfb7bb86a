"""Pure numerics of thermeta: arrays in, numbers out; no I/O, no clock.

The public entry point is :func:`forecast`, which returns a :class:`Forecast`;
:func:`forecast_levels` asks several thresholds of one series, its threshold-free fits done once.

The public names load on first use (numpy and scipy with them), so a module that needs only a
light part, such as ``predictors.result``, does not pay for the fits.
"""

from __future__ import annotations

import importlib
import sys
import types
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    from thermeta.predictors.curve import predict
    from thermeta.predictors.forecast import Forecast, forecast, forecast_levels

__all__ = ["Forecast", "forecast", "forecast_levels", "predict"]
_HOME = {
    "Forecast": "forecast",
    "forecast": "forecast",
    "forecast_levels": "forecast",
    "predict": "curve",
}


def __getattr__(name: str) -> Any:
    if name not in _HOME:
        raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
    value = getattr(importlib.import_module(f"{__name__}.{_HOME[name]}"), name)
    globals()[name] = value
    return value


class _Package(types.ModuleType):
    """Keeps ``predictors.forecast`` the function, as the eager package had it: importing the
    submodule of the same name sets the package's attribute to the submodule, and a plain
    module ``__getattr__`` would then never be asked."""

    @property
    def forecast(self) -> Any:
        found = globals().get("forecast")
        return (
            __getattr__("forecast")
            if found is None or isinstance(found, types.ModuleType)
            else found
        )

    @forecast.setter
    def forecast(self, value: Any) -> None:
        if not isinstance(value, types.ModuleType):  # the submodule's import: keep the function
            globals()["forecast"] = value


sys.modules[__name__].__class__ = _Package
