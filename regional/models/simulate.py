"""The public entry point :func:`simulate`: checks every argument, then runs the kernels."""

from __future__ import annotations

from collections.abc import Mapping

import numpy as np

from regional.models.base import Parameter, Simulation
from regional.models.gr4j import GR4J
from regional.models.linear import LinearReservoir
from regional.models.snow import DegreeDaySnow

_MODELS = {
    "linear": LinearReservoir(),
    "gr4j": GR4J(),
    "linear_potential_et": LinearReservoir("linear_potential_et", evaporation_reference_mm=0.0),
}
_SNOW = DegreeDaySnow()
EQUILIBRIUM_WINDOW_DAYS = 365


def model_names() -> tuple[str, ...]:
    """Names of the available storage models, the default (``"linear"``) first."""
    return tuple(_MODELS)


def get_model(name: str):
    """Return the storage model called ``name`` (e.g. ``"linear"``).

    Raises
    ------
    ValueError
        When no model has that name; the message lists the available ones.
    """
    try:
        return _MODELS[name]
    except (KeyError, TypeError):
        raise ValueError(
            f"unknown model {name!r}: available models are {', '.join(model_names())}"
        ) from None


def parameter_transforms(name: str) -> dict[str, str]:
    """Parameter name -> regression transform (``"log"`` / ``"identity"``) of a model."""
    return {parameter.name: parameter.transform for parameter in get_model(name).parameters}


def simulate(
    model: str,
    precip: np.ndarray,
    pet: np.ndarray,
    params: Mapping[str, float | np.ndarray],
    *,
    temp: np.ndarray | None = None,
    initial_storage: float | np.ndarray | None = None,
    warmup_days: int = 0,
) -> Simulation:
    """Simulate daily flow for n basins or parameter sets in one vectorised call.

    Parameters
    ----------
    model : str
        Model name: ``"linear"`` (evapotranspiration declining below a reference storage),
        ``"linear_potential_et"`` (evapotranspiration at the potential rate until the store is
        empty) or ``"gr4j"``.
    precip, pet : array_like, shape (time,) or (time, n)
        Precipitation and potential evapotranspiration, mm/day, finite and >= 0. A 1-D series
        (or one column) is shared by all n parameter sets.
    params : mapping
        Parameter name -> a float or an (n,) array, in the units of the model's parameter
        table, e.g. ``{"k_per_day": 0.05}`` or ``{"x1_mm": 350.0, "x2_mm_per_day": 0.0,
        "x3_mm": 90.0, "x4_days": 1.7}``. With ``temp``, the snow parameters
        (``snow_threshold_c``, ``melt_threshold_c``, ``melt_factor_mm_per_degc_day``) may be
        given too; missing ones take their default.
    temp : array_like, shape (time,) or (time, n), optional
        Daily mean air temperature, degC. When given, a degree-day snow store sits in front.
    initial_storage : float or array_like (n,), optional
        Storage at the start, mm. Default: the store's equilibrium for the mean forcing of the
        first ``max(warmup_days, 365)`` days (mean net input / k for the linear store). For
        GR4J the total of the production and routing stores, both filled to the same share of
        their capacities (at most X1 + X3; the unit hydrographs start empty); default half full.
        ``Simulation.initial_storage`` reports the storage actually used.
    warmup_days : int, default 0
        Leading days that only spin the stores up; recorded so scoring can skip them.

    Returns
    -------
    Simulation
        ``flow``, ``aet``, ``storage`` (and ``snowpack``, ``melt`` with temperature; and
        ``exchange`` for GR4J), each shaped (time, n).

    Raises
    ------
    ValueError
        For non-finite or negative forcing, mismatched lengths, unknown or missing parameters
        and values outside a parameter's bounds; the message names the argument and value.
    """
    chosen = get_model(model)
    precip2, pet2, temp2 = _forcing_columns(precip, pet, temp)
    n = _count_sets(params, precip2, pet2, temp2)
    model_params = _parameter_arrays(chosen.parameters, params, n, required=True)
    known = {p.name for p in chosen.parameters}
    if temp2 is not None:
        known |= {p.name for p in _SNOW.parameters}
    _reject_unknown(params, known, model)
    warmup_days = _check_warmup(warmup_days, precip2.shape[0])

    snowpack = melt = None
    inflow = precip2
    if temp2 is not None:
        snow_params = _parameter_arrays(_SNOW.parameters, params, n, required=False)
        inflow, snowpack, melt = _run_snow(precip2, temp2, snow_params, n)
    start = _initial_storage(chosen, initial_storage, inflow, pet2, model_params, n, warmup_days)
    # A model returns (flow, aet, storage) or, with an exchange term, (..., exchange).
    flow, aet, storage, *exchange = chosen.run(inflow, pet2, model_params, start)
    exchange = exchange[0] if exchange else None
    return Simulation(flow, aet, storage, snowpack, melt, start, warmup_days, exchange)


def _run_snow(precip, temp, snow_params, n: int):
    """The snow store, once for a shared column when every set has the same snow parameters.

    Parameter sets that differ only in the storage model's parameters (a calibration with fixed
    snow) get the same liquid input, so it is computed once and broadcast (read-only views).
    """
    same = all(values.min() == values.max() for values in snow_params.values())
    if not (same and precip.shape[1] == 1 and temp.shape[1] == 1 and n > 1):
        return _SNOW.run(precip, temp, snow_params, np.zeros(n))
    one = {name: values[:1] for name, values in snow_params.items()}
    liquid, pack, melt = _SNOW.run(precip, temp, one, np.zeros(1))
    shape = (precip.shape[0], n)
    return liquid, np.broadcast_to(pack, shape), np.broadcast_to(melt, shape)


def _as_columns(values: np.ndarray, name: str) -> np.ndarray:
    array = np.asarray(values, dtype=np.float64)
    if array.ndim == 1:
        array = array[:, None]
    if array.ndim != 2 or array.shape[0] == 0:
        raise ValueError(f"{name} must be shaped (time,) or (time, n) with time >= 1")
    return np.ascontiguousarray(array)


def _check_finite(array: np.ndarray, name: str, *, non_negative: bool) -> None:
    bad = ~np.isfinite(array)
    if non_negative:
        bad |= array < 0
    if bad.any():
        step, column = np.argwhere(bad)[0]
        rule = "finite and >= 0" if non_negative else "finite"
        raise ValueError(
            f"{name} must be {rule}: found {float(array[step, column])!r} at step {step}, "
            f"column {column} ({int(bad.sum())} bad values in all)"
        )


def _forcing_columns(precip, pet, temp):
    precip2 = _as_columns(precip, "precip")
    pet2 = _as_columns(pet, "pet")
    _check_finite(precip2, "precip", non_negative=True)
    _check_finite(pet2, "pet", non_negative=True)
    temp2 = None
    if temp is not None:
        temp2 = _as_columns(temp, "temp")
        _check_finite(temp2, "temp", non_negative=False)
    lengths = {"precip": precip2.shape[0], "pet": pet2.shape[0]}
    if temp2 is not None:
        lengths["temp"] = temp2.shape[0]
    if len(set(lengths.values())) > 1:
        raise ValueError(f"forcing series differ in length (days): {lengths}")
    return precip2, pet2, temp2


def _count_sets(params, *arrays) -> int:
    sizes = {int(np.size(v)) for v in params.values() if np.ndim(v) > 0}
    sizes |= {a.shape[1] for a in arrays if a is not None and a.shape[1] > 1}
    sizes.discard(1)
    if len(sizes) > 1:
        raise ValueError(
            f"parameter arrays and forcing columns disagree on the number of sets: {sorted(sizes)}"
        )
    return sizes.pop() if sizes else 1


def _parameter_arrays(
    table: tuple[Parameter, ...], params, n: int, *, required: bool
) -> dict[str, np.ndarray]:
    arrays = {}
    for parameter in table:
        if parameter.name not in params:
            if required:
                raise ValueError(
                    f"missing parameter {parameter.name!r} ({parameter.unit}); "
                    f"give a value between {parameter.lower} and {parameter.upper}"
                )
            arrays[parameter.name] = np.full(n, parameter.initial)
            continue
        values = np.asarray(params[parameter.name], dtype=np.float64).ravel()
        values = np.ascontiguousarray(np.broadcast_to(values, (n,)))
        outside = ~((values >= parameter.lower) & (values <= parameter.upper))
        if outside.any():
            raise ValueError(
                f"parameter {parameter.name} = {float(values[outside][0])!r} {parameter.unit} "
                f"is outside its bounds [{parameter.lower}, {parameter.upper}]"
            )
        arrays[parameter.name] = values
    return arrays


def _reject_unknown(params, known: set[str], model: str) -> None:
    unknown = sorted(set(params) - known)
    if unknown:
        raise ValueError(
            f"unknown parameter(s) {unknown} for model {model!r}; known: {sorted(known)} "
            "(snow parameters need temp)"
        )


def _check_warmup(warmup_days: int, n_steps: int) -> int:
    if int(warmup_days) != warmup_days or not 0 <= warmup_days < n_steps:
        raise ValueError(
            f"warmup_days must be a whole number from 0 to {n_steps - 1}: got {warmup_days!r}"
        )
    return int(warmup_days)


def _initial_storage(chosen, initial_storage, inflow, pet, params, n, warmup_days) -> np.ndarray:
    if initial_storage is None:
        window = max(warmup_days, EQUILIBRIUM_WINDOW_DAYS)
        start = chosen.equilibrium_storage(inflow[:window], pet[:window], params)
        return np.ascontiguousarray(np.broadcast_to(start, (n,)), dtype=np.float64)
    start = np.asarray(initial_storage, dtype=np.float64).ravel()
    if not np.all(np.isfinite(start)) or np.any(start < 0):
        raise ValueError(f"initial_storage must be finite and >= 0 mm: got {initial_storage!r}")
    start = np.broadcast_to(start, (n,))
    # Optional model hook: stores with a capacity (GR4J) cap the start at what they can hold.
    feasible = getattr(chosen, "feasible_storage", None)
    if feasible is not None:
        start = feasible(start, params)
    return np.ascontiguousarray(start, dtype=np.float64)
