"""Storage models: pure numeric kernels behind one interface, and :func:`simulate`.

A model declares its parameter table (:class:`Parameter` rows: name, initial, bounds, unit,
regression transform) and simulates many parameter sets or basins in one call on arrays shaped
(time, n). Nothing here knows of files or pandas.
"""

from __future__ import annotations

from regional.models.base import Parameter, Simulation, StorageModel
from regional.models.gr4j import GR4J
from regional.models.linear import LinearReservoir
from regional.models.simulate import (
    Simulator,
    get_model,
    model_names,
    parameter_table,
    parameter_transforms,
    simulate,
    snow_parameters,
)
from regional.models.snow import DegreeDaySnow

__all__ = [
    "DegreeDaySnow",
    "GR4J",
    "LinearReservoir",
    "Parameter",
    "Simulation",
    "Simulator",
    "StorageModel",
    "get_model",
    "model_names",
    "parameter_table",
    "parameter_transforms",
    "simulate",
    "snow_parameters",
]
