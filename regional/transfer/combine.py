"""Combine the parameter sets donated to one target into one daily flow series.

- Output averaging (default): simulate every donor set on the target's forcing in ONE vectorised
  call (parameter arrays of length n_donors, flow shaped (time, n_donors)), then take the
  weighted mean of the flows, Q(t) = sum_i w_i Q_i(t). An ensemble of donor simulations as in
  McIntyre et al. (2005, Water Resources Research 41, W12434); compared with parameter
  averaging by Oudin et al. (2008, Water Resources Research 44, W03413).
- Parameter averaging: the weighted mean of each parameter in its transformed space
  (log k: a weighted geometric mean), back-transformed, then one simulation.

The members (one flow per donor) are kept with output averaging so that bounds can be read from
the donors' spread. See ``docs/donor-combination.md``.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import dataclass

import numpy as np
import pandas as pd

from regional import models
from regional.errors import InputError
from regional.transfer.base import (
    Donation,
    check_combine,
    forward,
    inverse,
    resolve_transforms,
)

SimulateFn = Callable[..., object]
"""Signature of :func:`regional.simulate`: (model, precip, pet, params, *, temp,
initial_storage, warmup_days) -> an object with ``flow`` shaped (time, n)."""


@dataclass(frozen=True)
class DonorFlows:
    """Flow for one target built from its donors.

    Attributes
    ----------
    target_id : str
        The target basin.
    flow : ndarray (time,)
        Combined flow, mm/day.
    members : ndarray (time, n_donors) or None
        Flow simulated with each donor's set, mm/day (output averaging), else None.
    weights : ndarray (n_donors,)
        Donor weights (sum to 1), in the order of ``donor_ids``.
    donor_ids : tuple of str
        Donors with positive weight, in rank order (zero-weight donors are not simulated).
    parameters : dict
        Parameter -> (n_donors,) array simulated (output averaging) or a 1-element array with
        the averaged set (parameter averaging), parameter units.
    combine : str
        ``"output"`` or ``"parameter"``.
    """

    target_id: str
    flow: np.ndarray
    members: np.ndarray | None
    weights: np.ndarray
    donor_ids: tuple[str, ...]
    parameters: dict[str, np.ndarray]
    combine: str


def average_parameters(
    sets: pd.DataFrame, transforms: Mapping[str, str], *, parameters: tuple[str, ...]
) -> dict[str, float]:
    """Weighted mean of one target's donor parameters in transformed space, back-transformed.

    Parameters
    ----------
    sets : pandas.DataFrame
        Rows of one target (columns ``weight`` and the parameters).
    transforms : mapping
        Parameter -> ``"log"`` or ``"identity"``.
    parameters : tuple of str
        Parameter columns to average.

    Returns
    -------
    dict
        Parameter -> averaged value, parameter units.
    """
    weights = sets["weight"].to_numpy(dtype=float)
    weights = weights / weights.sum()
    return {
        name: float(
            inverse(
                weights @ forward(sets[name].to_numpy(dtype=float), transforms[name]),
                transforms[name],
            )
        )
        for name in parameters
    }


def simulate_donors(
    donation: Donation,
    target_id: str | None = None,
    *,
    precip: np.ndarray,
    pet: np.ndarray,
    temp: np.ndarray | None = None,
    model: str = "linear",
    combine: str | None = None,
    transforms: Mapping[str, str] | None = None,
    warmup_days: int = 0,
    initial_storage: float | None = None,
    simulate: SimulateFn | None = None,
) -> DonorFlows:
    """Simulate one target's donor sets on its forcing and combine the flows.

    Parameters
    ----------
    donation : Donation
        From a fitted transfer's ``donate``.
    target_id : str, optional
        Target to build; may be omitted when the donation holds a single target.
    precip, pet : ndarray (time,)
        The target's daily precipitation and PET, mm/day.
    temp : ndarray (time,), optional
        The target's daily mean temperature, degC (enables the snow store).
    model : str, default "linear"
        Storage model name passed to ``simulate``.
    combine : {"output", "parameter"}, optional
        Default: ``donation.combine``.
    transforms : mapping, optional
        Parameter -> transform for parameter averaging. Default: ``donation.transforms``.
    warmup_days : int, default 0
        Passed to ``simulate``.
    initial_storage : float, optional
        Storage at the start, mm (same for every donor); default: the model's own.
    simulate : callable, optional
        Simulation function with the signature of :func:`regional.simulate` (default).

    Returns
    -------
    DonorFlows
    """
    simulate = _simulate_function(simulate)
    combine = check_combine(
        donation.combine if combine is None else combine, method=donation.method
    )
    transforms = resolve_transforms(
        donation.transforms if transforms is None else transforms,
        donation.parameters,
        method=donation.method,
    )
    target_id = _one_target(donation, target_id)
    sets = donation.for_target(target_id)
    sets = sets[sets["weight"] > 0]  # e.g. a donor at distance 0 takes all the weight
    weights = sets["weight"].to_numpy(dtype=float)
    weights = weights / weights.sum()
    if combine == "output":
        params = {name: sets[name].to_numpy(dtype=float) for name in donation.parameters}
    else:
        averaged = average_parameters(sets, transforms, parameters=donation.parameters)
        params = {name: np.array([value]) for name, value in averaged.items()}
    result = simulate(
        model,
        np.asarray(precip, dtype=float),
        np.asarray(pet, dtype=float),
        params,
        temp=None if temp is None else np.asarray(temp, dtype=float),
        initial_storage=initial_storage,
        warmup_days=warmup_days,
    )
    flows = _flow_columns(result, len(next(iter(params.values()))), donation.method)
    if combine == "output":
        combined, members = flows @ weights, flows
    else:
        combined, members = flows[:, 0], None
    return DonorFlows(
        target_id=target_id,
        flow=combined,
        members=members,
        weights=weights,
        donor_ids=tuple(sets["donor_id"].astype(str)),
        parameters=params,
        combine=combine,
    )


def _simulate_function(simulate: SimulateFn | None) -> SimulateFn:
    return models.simulate if simulate is None else simulate


def _one_target(donation: Donation, target_id: str | None) -> str:
    if target_id is not None:
        return str(target_id)
    if len(donation.targets) != 1:
        raise InputError(
            f"{donation.method} donation holds {len(donation.targets)} targets; name the one "
            "to simulate with target_id."
        )
    return str(donation.targets[0])


def _flow_columns(result: object, n_sets: int, method: str) -> np.ndarray:
    flow = np.asarray(result.flow, dtype=float)
    if flow.ndim == 1:
        flow = flow[:, None]
    if flow.ndim != 2 or flow.shape[1] != n_sets:
        raise ValueError(
            f"{method} donor flows: simulate returned flow shaped {flow.shape}; expected "
            f"(time, {n_sets}) for {n_sets} parameter set(s)."
        )
    return flow
