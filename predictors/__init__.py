"""Pure numerics of thermeta: arrays in, numbers out; no I/O, no clock.

The public entry point is :func:`forecast`, which returns a :class:`Forecast`.
"""

from thermeta.predictors.curve import predict
from thermeta.predictors.forecast import Forecast, forecast

__all__ = ["Forecast", "forecast", "predict"]
