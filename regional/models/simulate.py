"""The public entry point :func:`simulate`: checks every argument, then runs the kernels."""

from __future__ import annotations

from collections.abc import Collection, Mapping

import numpy as np

from regional.models.base import Parameter, Simulation, StorageModel
from regional.models.gr4j import GR4J
from regional.models.linear import LinearReservoir
from regional.models.snow import MELT_THRESHOLD, DegreeDaySnow

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


def get_model(name: str) -> StorageModel:
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


def snow_parameters(*, optional: bool = False) -> tuple[Parameter, ...]:
    """Parameter table of the degree-day snow store (in front of any model with temperature);
    with ``optional``, also the parameters the store can do without (the melt threshold)."""
    return (*_SNOW.parameters, *_SNOW.optional) if optional else _SNOW.parameters


def parameter_table(
    name: str, *, snow: bool = False, fixed: Collection[str] = ()
) -> tuple[Parameter, ...]:
    """The parameters calibrated and transferred for a model: its own table, then the snow
    store's when the store runs, less the parameters held ``fixed`` (names).

    Each model part owns its table (:class:`Parameter` rows: name, unit, bounds, transform,
    default); this only puts the parts of one chain together.
    """
    parts = [*get_model(name).parameters, *(_SNOW.parameters if snow else ())]
    return tuple(p for p in parts if p.name not in set(fixed))


def parameter_transforms(
    name: str, *, snow: bool = False, fixed: Collection[str] = ()
) -> dict[str, str]:
    """Parameter name -> regression transform (``"log"`` / ``"identity"``) of
    :func:`parameter_table`."""
    return {p.name: p.transform for p in parameter_table(name, snow=snow, fixed=fixed)}


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
    prepared = Simulator(
        model, precip, pet, temp=temp, initial_storage=initial_storage, warmup_days=warmup_days
    )
    return prepared.run(params)


class Simulator:
    """One basin's (or one forcing table's) forcing, checked once, run for many parameter sets.

    :func:`simulate` in two steps, for searches that call the model hundreds of times on the
    same forcing: the forcing and the warm-up are checked here, once; :meth:`run` and
    :meth:`flow` check only the parameters. Arguments as for :func:`simulate`.
    """

    def __init__(
        self,
        model: str,
        precip: np.ndarray,
        pet: np.ndarray,
        *,
        temp: np.ndarray | None = None,
        initial_storage: float | np.ndarray | None = None,
        warmup_days: int = 0,
    ) -> None:
        self.model = get_model(model)
        self.precip, self.pet, self.temp = _forcing_columns(precip, pet, temp)
        self.initial_storage = initial_storage
        self.warmup_days = _check_warmup(warmup_days, self.precip.shape[0])
        known = {p.name for p in self.model.parameters}
        if self.temp is not None:
            known |= {p.name for p in (*_SNOW.parameters, *_SNOW.optional)}
        self._known = known

    def run(self, params: Mapping[str, float | np.ndarray]) -> Simulation:
        """Simulate every parameter set; see :func:`simulate` for ``params`` and the result."""
        chosen = self.model
        n = _count_sets(params, self.precip, self.pet, self.temp)
        model_params = _parameter_arrays(chosen.parameters, params, n, required=True)
        _reject_unknown(params, self._known, chosen.name)
        snowpack = melt = None
        inflow = self.precip
        if self.temp is not None:
            snow_params = _parameter_arrays(_SNOW.parameters, params, n, required=False)
            if MELT_THRESHOLD.name in params:
                snow_params |= _parameter_arrays(_SNOW.optional, params, n, required=True)
            inflow, snowpack, melt = _run_snow(self.precip, self.temp, snow_params, n)
        start = _initial_storage(
            chosen, self.initial_storage, inflow, self.pet, model_params, n, self.warmup_days
        )
        # A model returns (flow, aet, storage) or, with an exchange term, (..., exchange).
        flow, aet, storage, *exchange = chosen.run(inflow, self.pet, model_params, start)
        exchange = exchange[0] if exchange else None
        return Simulation(flow, aet, storage, snowpack, melt, start, self.warmup_days, exchange)

    def flow(self, params: Mapping[str, float | np.ndarray]) -> np.ndarray:
        """Flow only, mm/day, shaped (time, n)."""
        return self.run(params).flow

    def flow_of_sets(
        self, sets: Mapping[str, np.ndarray], *, columns: np.ndarray | None = None
    ) -> np.ndarray:
        """Flow, mm/day (time, n), for parameter sets a search keeps within bounds.

        The inner loop of a calibration: ``sets`` holds every parameter of the model (and of
        the snow store when it runs) as an (n,) float64 array inside its bounds, so nothing is
        checked again (a search clips its points to the bounds); :meth:`run` checks everything.
        ``columns`` (n,) picks the forcing column of each set (many basins' sets in one call);
        None: the forcing as given (one shared column, or one per set).
        """
        chosen = self.model
        model_params = {p.name: sets[p.name] for p in chosen.parameters}
        n = len(model_params[chosen.parameters[0].name])
        precip, pet, temp = self.precip, self.pet, self.temp
        if columns is not None:
            precip, pet = _pick(precip, columns), _pick(pet, columns)
            temp = None if temp is None else _pick(temp, columns)
        inflow = precip
        if temp is not None:
            snow_params = {p.name: sets[p.name] for p in _SNOW.parameters}
            if MELT_THRESHOLD.name in sets:
                snow_params[MELT_THRESHOLD.name] = sets[MELT_THRESHOLD.name]
            inflow = _run_snow(precip, temp, snow_params, n)[0]
        start = _initial_storage(
            chosen, self.initial_storage, inflow, pet, model_params, n, self.warmup_days
        )
        return chosen.run(inflow, pet, model_params, start)[0]


def _pick(forcing: np.ndarray, columns: np.ndarray) -> np.ndarray:
    """The forcing columns of the sets (a shared column stays shared)."""
    if forcing.shape[1] == 1:
        return forcing
    if columns.size > 0 and (columns == columns[0]).all():
        return forcing[:, columns[:1]]
    return np.ascontiguousarray(forcing[:, columns])


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
