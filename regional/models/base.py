"""Model parts' shared vocabulary: the parameter table and the simulation result.

Pure numpy; no pandas, no I/O.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from typing import Protocol, runtime_checkable

import numpy as np

TRANSFORMS = ("log", "identity")
"""Spaces a parameter may be regressed and averaged in."""


def forward(values: np.ndarray, transform: str) -> np.ndarray:
    """Map parameter values (parameter units) into the transformed space (a new array)."""
    values = np.asarray(values, dtype=float)
    return np.log(values) if transform == "log" else values.copy()


def inverse(values: np.ndarray, transform: str) -> np.ndarray:
    """Map values from the transformed space back into parameter units (a new array)."""
    values = np.asarray(values, dtype=float)
    return np.exp(values) if transform == "log" else values.copy()


@dataclass(frozen=True)
class Parameter:
    """One row of a model part's parameter table.

    Attributes
    ----------
    name : str
        Column name used everywhere (unit in the name, e.g. ``k_per_day``).
    initial : float
        Starting or default value, in ``unit``.
    lower, upper : float
        Bounds of the search and of accepted values, in ``unit``.
    unit : str
        Unit of the value, e.g. ``"1/day"``.
    transform : {"log", "identity"}
        Space in which the parameter is regressed and averaged.
    description : str
        One line for tables and the report.
    """

    name: str
    initial: float
    lower: float
    upper: float
    unit: str
    transform: str
    description: str = ""

    def __post_init__(self) -> None:
        if self.transform not in TRANSFORMS:
            raise ValueError(f"parameter {self.name}: transform must be one of {TRANSFORMS}")
        if not self.lower <= self.initial <= self.upper:
            raise ValueError(f"parameter {self.name}: initial value outside its bounds")
        if self.transform == "log" and self.lower <= 0:
            raise ValueError(f"parameter {self.name}: log transform needs a positive lower bound")

    def forward(self, values: np.ndarray) -> np.ndarray:
        """Map values from parameter units into the transformed space."""
        return forward(values, self.transform)

    def inverse(self, values: np.ndarray) -> np.ndarray:
        """Map values from the transformed space back into parameter units."""
        return inverse(values, self.transform)


@dataclass(frozen=True)
class Simulation:
    """Result of one call of :func:`regional.simulate`; every array is shaped (time, n).

    Attributes
    ----------
    flow : ndarray
        Flow out of the model over each step, mm/day.
    aet : ndarray
        Actual evapotranspiration over each step, mm/day.
    storage : ndarray
        Water held in the model's stores at the end of each step, mm (snow pack excluded).
    snowpack : ndarray or None
        Snow water equivalent at the end of each step, mm; None without the snow store.
    melt : ndarray or None
        Melt leaving the pack over each step, mm/day; None without the snow store.
    initial_storage : ndarray, shape (n,)
        Storage at the start of the first step, mm.
    warmup_days : int
        Leading steps that only spin up the stores; exclude them from scoring.
    exchange : ndarray or None
        Water exchanged with outside the basin over each step, mm/day, positive = gained (GR4J's
        groundwater exchange); None for models without exchange. With it the balance reads
        sum(P) + sum(exchange) = sum(aet) + sum(flow) + change in storage (+ change in pack).
    """

    flow: np.ndarray
    aet: np.ndarray
    storage: np.ndarray
    snowpack: np.ndarray | None
    melt: np.ndarray | None
    initial_storage: np.ndarray
    warmup_days: int
    exchange: np.ndarray | None = None

    @property
    def scored_flow(self) -> np.ndarray:
        """Flow after the warm-up, mm/day, shaped (time - warmup_days, n)."""
        return self.flow[self.warmup_days :]


@runtime_checkable
class StorageModel(Protocol):
    """What a storage model provides; the models' registry (:func:`regional.models.get_model`)
    holds one instance per name. A new model is one module implementing this plus one registry
    line; calibration, transfer and simulation read everything else from it.

    Attributes
    ----------
    name : str
        Registry name, e.g. ``"linear"``.
    parameters : tuple of Parameter
        The parameter table (names with units, initial values, bounds, transforms).
    description : str
        One paragraph for the report.
    references : tuple of str
        Publications of the model.
    """

    name: str
    parameters: tuple[Parameter, ...]
    description: str
    references: tuple[str, ...]

    def equilibrium_storage(
        self, inflow: np.ndarray, pet: np.ndarray, params: Mapping[str, np.ndarray]
    ) -> np.ndarray:
        """Default storage at the start, mm, shaped (n,)."""
        ...

    def run(
        self,
        inflow: np.ndarray,
        pet: np.ndarray,
        params: Mapping[str, np.ndarray],
        initial_storage: np.ndarray,
    ) -> tuple[np.ndarray, ...]:
        """Flow, actual evapotranspiration and storage (and exchange), each (time, n)."""
        ...
