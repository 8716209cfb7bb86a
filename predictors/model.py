"""The base of the forecast models, and the table from a model's name to the model.

Each model turns a :class:`~thermeta.predictors.context.Context` (the readings of the current
regime and the call's settings) into a filled :class:`~thermeta.predictors.result.Forecast`:

    lumped    Newton's law (ambient fitted, given, or measured by an air probe); where one
              exponential does not explain the readings, candidates scored by how well they
              forecast the item's own readings (predictors.combine)
    slab, cylinder, sphere    a probe at the centre of a thick product (predictors.conduction)
    auto      the lumped model unless a core shape has a clearly lower AICc

The implementations live beside their numerics (lumped_forecast.py, conduction_forecast.py) and
register here through :func:`model`.
"""

from __future__ import annotations

from abc import ABC, abstractmethod
from functools import cache
from typing import ClassVar

from thermeta.predictors.context import Context
from thermeta.predictors.result import Forecast

MODEL_NAMES = ("lumped", "slab", "cylinder", "sphere", "auto")


class Model(ABC):
    """A forecast model: fills ``fc`` from the context's readings; never raises on data (a failed
    fit is ``fc.fail(...)``)."""

    name: str
    # regime changes are searched with lumped curves, which a lagging centre probe misfits by
    # nature: models that cannot be cut that way keep the window whole
    cuts_regimes: ClassVar[bool] = False
    uses_prior: ClassVar[bool] = False

    @abstractmethod
    def forecast(self, ctx: Context, fc: Forecast) -> Forecast: ...


@cache
def models() -> dict[str, Model]:
    """The table from a model's name to the model."""
    # imported here: the implementations import this module for the base class
    from thermeta.predictors.conduction_forecast import AutoModel, ConductionModel
    from thermeta.predictors.lumped_forecast import LumpedModel

    return {
        "lumped": LumpedModel(),
        "slab": ConductionModel("slab"),
        "cylinder": ConductionModel("cylinder"),
        "sphere": ConductionModel("sphere"),
        "auto": AutoModel(),
    }


def model(name: str) -> Model:
    """The model called ``name`` (one of MODEL_NAMES); ValueError for any other name."""
    if name not in MODEL_NAMES:
        raise ValueError(f"model must be one of {', '.join(MODEL_NAMES)}, got {name!r}")
    return models()[name]
