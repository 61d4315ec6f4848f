"""The one step leave-one-out, the held-out check, prediction and screening share: fit the
configured transfer methods on training basins, and simulate a donation at target basins.

:func:`fit_methods` fits every configured method (and the median benchmark) on the training
basins' attributes and parameters with :func:`regional.transfer.fit_transfer` (their plain
classes: prediction from a stored fitted region imports no scikit-learn);
:class:`DonationSimulation` turns a donation into each target's daily flow from the targets'
forcing arrays (the model, the fixed snow parameters, the warm-up and the initial storage of
the fitted window; donors combined by :func:`regional.transfer.simulate_donors`). Only plain
arrays and tables cross this step, so it knows nothing of regions, files or folds.
"""

from __future__ import annotations

import warnings
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from regional.errors import InputWarning
from regional.models import parameter_table, simulate
from regional.transfer import fit_transfer
from regional.transfer.base import Donation
from regional.transfer.combine import simulate_donors

CALIBRATED = "calibrated"
"""The basin's own calibrated parameters: the upper bound every transfer is compared with."""
MEDIAN = "median"
"""The regional median parameters: the benchmark every transfer method must beat."""


@dataclass(frozen=True)
class TransferOptions:
    """How the transfer methods are built in every fold and in prediction.

    Attributes
    ----------
    methods : tuple of str
        Methods to validate (``regression``, ``similarity``, ``proximity``, ``median``).
    attributes : tuple of str or None
        Attribute columns for regression and similarity (None: every numeric column given).
    n_donors : int
        Donors per target for the donor methods (similarity, proximity, blended) unless
        ``chosen_donors`` names the method.
    power : float
        Inverse-distance weighting power.
    combine : {"output", "parameter"}
        Donor combination into flow.
    donor_choices : tuple of int
        Candidate donor counts for :func:`regional.crossval.choose_donor_counts` (empty:
        ``n_donors`` is used).
    chosen_donors : mapping
        Method -> donor count picked in leave-one-out
        (see :func:`regional.crossval.with_donor_counts`).
    """

    methods: tuple[str, ...] = ("regression", "similarity", "proximity")
    attributes: tuple[str, ...] | None = None
    n_donors: int = 5
    power: float = 1.0
    combine: str = "output"
    donor_choices: tuple[int, ...] = ()
    chosen_donors: Mapping[str, int] = field(default_factory=dict)

    def donors_for(self, method: str) -> int:
        """Donors per target for ``method``: the count chosen for it, else ``n_donors``."""
        return int(self.chosen_donors.get(method, self.n_donors))


def method_order(methods: Sequence[str]) -> tuple[str, ...]:
    """Calibrated and median first, then the configured methods (each once)."""
    ordered = [CALIBRATED, MEDIAN]
    ordered += [m for m in methods if m not in ordered]
    return tuple(ordered)


def fit_methods(
    X: pd.DataFrame,
    y: pd.DataFrame,
    *,
    transforms: Mapping[str, str],
    options: TransferOptions,
    level: float,
    methods: Sequence[str] | None = None,
) -> tuple[dict[str, object], list[str]]:
    """Every configured method and the median, fit on these training basins.

    Parameters
    ----------
    X : DataFrame
        Training basins x attributes (and the coordinates proximity needs), indexed by basin id.
    y : DataFrame
        Training basins x transferred parameters (parameter units), same index as ``X``.
    transforms : mapping
        Parameter -> ``"log"`` / ``"identity"``: the regression transform of each parameter.
    options : TransferOptions
        Methods, attribute columns, donor counts, weighting power, combination.
    level : float
        Interval level of regression and median, e.g. 0.9.
    methods : sequence of str, optional
        Only these methods (default: every configured method and the median).

    Returns
    -------
    (estimators, notes)
        Method -> the method's fitted plain class (no scikit-learn; the same numbers as its
        estimator); the distinct warnings raised while fitting, each prefixed ``"prediction: "``.
    """
    attributes = list(options.attributes) if options.attributes else None
    chosen = method_order(options.methods)[1:] if methods is None else tuple(methods)
    estimators = {}
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", InputWarning)
        for method in chosen:
            estimators[method] = fit_transfer(
                method,
                X,
                y,
                transforms=transforms,
                attributes=attributes,
                n_donors=options.donors_for(method),
                power=options.power,
                combine=options.combine,
                level=level,
                plain=True,
            )
    notes = sorted({f"prediction: {w.message}" for w in caught})
    return estimators, notes


@dataclass(frozen=True)
class DonationSimulation:
    """How a donation becomes a target's daily flow: the same in every fold and prediction.

    Attributes
    ----------
    model : str
        A registered storage model (:mod:`regional.models`).
    warmup_days : int
        Days at the start of the forcing simulated but not scored.
    fixed_params : mapping
        Parameters set in the config (the snow store's), added to every donated set.
    initial_storage : float or None
        Initial storage, mm (None: the model's default).
    """

    model: str
    warmup_days: int
    fixed_params: Mapping[str, float] = field(default_factory=dict)
    initial_storage: float | None = None

    def flow(
        self,
        donation: Donation,
        target: str,
        *,
        precip: np.ndarray,
        pet: np.ndarray,
        temp: np.ndarray | None = None,
    ) -> np.ndarray:
        """Flow of one target from its donated sets.

        Parameters
        ----------
        donation : Donation
            Holds the target's sets.
        target : str
            The target's basin id.
        precip, pet : ndarray (days,)
            The target's forcing over the window, mm/day.
        temp : ndarray (days,), optional
            Air temperature, degC, when the snow store runs.

        Returns
        -------
        ndarray (days,)
            mm/day over the window, warm-up days included.
        """
        flows = simulate_donors(
            donation,
            target,
            precip=precip,
            pet=pet,
            temp=temp,
            model=self.model,
            warmup_days=self.warmup_days,
            initial_storage=self.initial_storage,
            simulate=donor_simulator(self.model, self.fixed_params),
        )
        return flows.flow

    def flows(
        self,
        donation: Donation,
        targets: Sequence[str],
        *,
        precip: np.ndarray,
        pet: np.ndarray,
        temp: np.ndarray | None = None,
    ) -> np.ndarray:
        """Flow of each target from its donated sets (:meth:`flow` target by target).

        ``precip``, ``pet`` (mm/day) and ``temp`` (degC, optional) are days x targets arrays,
        one column per target in the order of ``targets``. Returns days x targets, mm/day,
        warm-up days included.
        """
        columns = [
            self.flow(
                donation,
                target,
                precip=_column(precip, i),
                pet=_column(pet, i),
                temp=None if temp is None else _column(temp, i),
            )
            for i, target in enumerate(targets)
        ]
        return np.column_stack(columns)


def _column(values: np.ndarray, i: int) -> np.ndarray:
    """Column ``i`` of a days x targets array as a contiguous float64 series."""
    return np.ascontiguousarray(values[:, i], dtype=float)


def donor_simulator(model: str, fixed: Mapping[str, float]):
    """A ``simulate`` for donor sets: fixed (snow) parameters added, values clipped to bounds.

    A transfer may give a parameter outside the model's bounds (a regression extrapolating in
    log space, say); the set is then simulated at the nearest bound, as calibration would have
    found it.
    """
    table = parameter_table(model, snow=True)

    def simulate_sets(
        model_name, precip, pet, params, *, temp=None, initial_storage=None, warmup_days=0
    ):
        n = len(next(iter(params.values())))
        sets = {name: np.full(n, value) for name, value in fixed.items()}
        for parameter in table:
            if parameter.name not in params:  # snow parameters without the snow store
                continue
            values = np.asarray(params[parameter.name], dtype=float)
            sets[parameter.name] = np.clip(values, parameter.lower, parameter.upper)
        return simulate(
            model_name,
            precip,
            pet,
            sets,
            temp=temp,
            initial_storage=initial_storage,
            warmup_days=warmup_days,
        )

    return simulate_sets
