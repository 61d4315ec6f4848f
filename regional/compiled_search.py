"""The fast search's descents compiled whole for GR4J (with or without the snow store).

A descent of the fast search (:func:`regional.search.screen_and_descend`) scores one point at a
time. Run in lockstep over the basins from Python, each step costs a call of the model, the
objective and the bookkeeping of every basin still descending. Here one compiled loop per basin
drives the Nelder-Mead state machine of :mod:`regional.search` with the basin's own energy: the
snow kernel, the GR4J kernel (the very kernels :func:`regional.simulate` runs, on one column)
and the objective over the calibration days, with no Python between the runs.

The energy is the one :class:`regional.calibrate` scores in Python (minus the objective over the
calibration days, :data:`FAILED_SCORE` where it is undefined), computed in another order of
summation: the two agree to round-off (tested, 1e-10).

Numba caches each compiled function beside its own source file only: after an edit of the
kernels (models/gr4j.py, models/snow.py) or of the state machine (search.py), delete the cached
``compiled_search.*.nbi``/``.nbc`` files in ``regional/__pycache__`` so this module is compiled
again with them (the equality tests fail otherwise).
"""

from __future__ import annotations

from dataclasses import dataclass

import numba
import numpy as np

from regional import metrics
from regional.models.gr4j import _gr4j_kernel
from regional.models.snow import _snow_kernel
from regional.search import begin_descent, new_descent, tell_descent

FAILED_SCORE = 1e10
"""Energy of a parameter set whose score is undefined (NaN), as in the Python path."""
OBJECTIVE_CODES = {"nse": 0, "kge": 1, "log_nse": 2, "nse_blend": 3}
"""Objectives the compiled energy scores (every one of :data:`regional.metrics.OBJECTIVES`)."""
PARAMETER_ORDER = (
    "x1_mm",
    "x2_mm_per_day",
    "x3_mm",
    "x4_days",
    "snow_threshold_c",
    "melt_factor_mm_per_degc_day",
    "melt_threshold_c",
)
"""Slots of the full parameter vector; a missing melt threshold is NaN (the snow threshold)."""


@dataclass(frozen=True)
class ColumnProblem:
    """Everything one basin's compiled energy reads, for every basin of a chunk.

    Attributes
    ----------
    precip, pet, temp : ndarray, shape (n_basins, time)
        Forcing of the simulated window, mm/day and degC (temp (0, time) without snow).
    obs_a, obs_b : ndarray, shape (n_basins, scored time)
        Observed series the objective compares with (see :func:`prepare_observations`).
    ss_a, ss_b, mean_obs, offset : ndarray, shape (n_basins,)
        Their sums of squared deviations, the mean observed flow, the log offset.
    first : int
        First simulated step of the scored series.
    objective : int
        Code of :data:`OBJECTIVE_CODES`.
    constant : ndarray, shape (7,)
        Full parameter vector (:data:`PARAMETER_ORDER`) with the values not searched.
    free : ndarray of int
        Slot of each searched parameter.
    log, lower, upper : ndarray, shape (n_free,)
        Whether each searched parameter is searched as its logarithm, and its bounds (units).
    box_lower, box_span : ndarray, shape (n_free,)
        The search box in the transformed space (the unit cube maps onto it).
    initial_storage : float
        Start storage, mm; NaN for the default (both stores half full).
    """

    precip: np.ndarray
    pet: np.ndarray
    temp: np.ndarray
    obs_a: np.ndarray
    obs_b: np.ndarray
    ss_a: np.ndarray
    ss_b: np.ndarray
    mean_obs: np.ndarray
    offset: np.ndarray
    first: int
    objective: int
    constant: np.ndarray
    free: np.ndarray
    log: np.ndarray
    lower: np.ndarray
    upper: np.ndarray
    box_lower: np.ndarray
    box_span: np.ndarray
    initial_storage: float

    def arrays(self) -> tuple:
        """The fields in the order of the compiled functions' arguments."""
        return tuple(getattr(self, name) for name in self.__dataclass_fields__)

    def energy(self, points: np.ndarray, owner: np.ndarray) -> np.ndarray:
        """Energies of points of the search box (n_free, m), each of the basin ``owner[i]``:
        the contract of :func:`regional.search.screen_and_descend`'s energy."""
        points = np.ascontiguousarray(np.reshape(points, (len(self.free), -1)).T, dtype=float)
        out = np.empty(len(points))
        _energies(points, np.asarray(owner, dtype=np.int64), out, *self.arrays())
        return out

    def descend(self, basins, starts, start_energies, budgets):
        """One compiled descent per basin (``basins``, unit-cube ``starts`` of known energies,
        ``budgets`` of runs after the first simplex); returns the best unit points, their
        energies and the runs spent."""
        n, n_dims = np.shape(starts)
        best = np.empty((n, n_dims))
        energies = np.empty(n)
        runs = np.zeros(n, dtype=np.int64)
        _descents(
            np.asarray(basins, dtype=np.int64),
            np.ascontiguousarray(starts, dtype=float),
            np.asarray(start_energies, dtype=float),
            np.asarray(budgets, dtype=np.int64),
            best,
            energies,
            runs,
            *self.arrays(),
        )
        return best, energies, runs


def column_problem(simulator, scored, objective: str, constant, free, first: int) -> ColumnProblem:
    """The compiled problem of GR4J calibrations (every basin a column of the simulator).

    Parameters
    ----------
    simulator : regional.models.Simulator
        Forcing of the window, one column per basin; a float (or None) start storage.
    scored : ndarray, shape (time - first, n_basins)
        Observed flow on the scored steps from ``first``, NaN where not scored.
    objective : str
        A key of :data:`OBJECTIVE_CODES`.
    constant : dict
        Values of the parameters not searched (model and snow store).
    free : sequence of Parameter
        The searched parameters, in the order of the search box's dimensions.
    first : int
        Simulated step of the first row of ``scored``.
    """
    full = np.full(len(PARAMETER_ORDER), np.nan)
    for name, value in constant.items():
        full[PARAMETER_ORDER.index(name)] = value
    temp = simulator.temp
    box_lower = np.array([p.forward(p.lower) for p in free])
    start = simulator.initial_storage
    return ColumnProblem(
        precip=np.ascontiguousarray(simulator.precip.T),
        pet=np.ascontiguousarray(simulator.pet.T),
        temp=np.empty((0, simulator.precip.shape[0]))
        if temp is None
        else np.ascontiguousarray(temp.T),
        **prepare_observations(objective, np.asarray(scored, dtype=float).T),
        first=int(first),
        objective=OBJECTIVE_CODES[objective],
        constant=full,
        free=np.array([PARAMETER_ORDER.index(p.name) for p in free], dtype=np.int64),
        log=np.array([p.transform == "log" for p in free]),
        lower=np.array([p.lower for p in free]),
        upper=np.array([p.upper for p in free]),
        box_lower=box_lower,
        box_span=np.array([p.forward(p.upper) for p in free]) - box_lower,
        initial_storage=np.nan if start is None else float(start),
    )


def prepare_observations(objective: str, scored: np.ndarray) -> dict[str, np.ndarray]:
    """Observed series transformed once for :func:`_score`, per basin (rows).

    ``scored`` (n_basins, time): observed flow, NaN on days not scored. ``obs_a`` is the flow
    (its logarithm plus the offset of :data:`regional.metrics.LOG_OFFSET_SHARE` of the mean
    for ``log_nse``), ``obs_b`` its square root (``nse_blend``); NaN where not scored.
    """
    mask = np.isfinite(scored)
    count = mask.sum(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.where(mask, scored, 0.0).sum(axis=1) / count
        offset = metrics.LOG_OFFSET_SHARE * mean
        positive = np.where(mask, np.maximum(scored, 0.0), 1.0)
        obs_a = scored
        if objective == "log_nse":
            obs_a = np.where(mask, np.log(positive + offset[:, None]), np.nan)
        obs_b = np.where(mask, np.sqrt(positive), np.nan)
    return {
        "obs_a": np.ascontiguousarray(obs_a),
        "obs_b": np.ascontiguousarray(obs_b),
        "ss_a": _squares(obs_a, mask),
        "ss_b": _squares(obs_b, mask),
        "mean_obs": mean,
        "offset": offset,
    }


def _squares(obs: np.ndarray, mask: np.ndarray) -> np.ndarray:
    """Sum of squared deviations from the mean over the scored days, per row (NaN if < 2)."""
    count = mask.sum(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.where(mask, obs, 0.0).sum(axis=1) / count
        squares = (np.where(mask, obs - mean[:, None], 0.0) ** 2).sum(axis=1)
    return np.where(count >= 2, squares, np.nan)


@numba.njit(cache=True, nogil=True)
def _nse(sim, obs, ss_obs, transform, offset):  # pragma: no cover - compiled
    """NSE of transformed sim (0: none, 1: log(max(sim, 0) + offset), 2: sqrt(max(sim, 0)))."""
    sse = 0.0
    for t in range(obs.shape[0]):
        if np.isfinite(obs[t]):
            value = sim[t]
            if transform == 1:
                value = np.log(max(value, 0.0) + offset)
            elif transform == 2:
                value = np.sqrt(max(value, 0.0))
            sse += (value - obs[t]) ** 2
    return 1.0 - sse / ss_obs


@numba.njit(cache=True, nogil=True)
def _kge(sim, obs, ss_obs, mean_obs):  # pragma: no cover - compiled
    """KGE (Gupta et al. 2009) over the days where obs is finite."""
    total = 0.0
    count = 0
    for t in range(obs.shape[0]):
        if np.isfinite(obs[t]):
            total += sim[t]
            count += 1
    mean_sim = total / count
    ss_sim = 0.0
    cross = 0.0
    for t in range(obs.shape[0]):
        if np.isfinite(obs[t]):
            dev = sim[t] - mean_sim
            ss_sim += dev * dev
            cross += (obs[t] - mean_obs) * dev
    r = cross / np.sqrt(ss_obs * ss_sim)
    alpha = np.sqrt(ss_sim / ss_obs)
    beta = mean_sim / mean_obs
    return 1.0 - np.sqrt((r - 1.0) ** 2 + (alpha - 1.0) ** 2 + (beta - 1.0) ** 2)


@numba.njit(cache=True, nogil=True)
def _score(code, sim, obs_a, obs_b, ss_a, ss_b, mean_obs, offset):  # pragma: no cover
    """The objective of :data:`OBJECTIVE_CODES` ``code`` (higher is better)."""
    if code == 0:
        return _nse(sim, obs_a, ss_a, 0, offset)
    if code == 1:
        return _kge(sim, obs_a, ss_a, mean_obs)
    if code == 2:
        return _nse(sim, obs_a, ss_a, 1, offset)
    return 0.5 * (_nse(sim, obs_a, ss_a, 0, offset) + _nse(sim, obs_b, ss_b, 2, offset))


@numba.njit(cache=True, nogil=True)
def _parameters(point, constant, free, log, lower, upper, out):  # pragma: no cover - compiled
    """Full parameter vector of a point of the box (as calibrate's Python path maps it)."""
    out[:] = constant
    for i in range(free.shape[0]):
        value = point[i]
        if log[i]:
            value = np.exp(value)
        out[free[i]] = min(max(value, lower[i]), upper[i])


@numba.njit(cache=True, nogil=True)
def _energy(point, basin, buffers, problem):  # pragma: no cover - compiled
    """Minus the objective of one basin for one point of the box."""
    (params, x, s0, r0, pack0, liquid, pack, melt, flow, skip) = buffers
    (precip, pet, temp, obs_a, obs_b, ss_a, ss_b, mean_obs, offset, first, objective) = problem[
        :11
    ]
    constant, free, log, lower, upper, _, _, start = problem[11:]
    _parameters(point, constant, free, log, lower, upper, params)
    n_steps = precip.shape[1]
    inflow = precip[basin].reshape((n_steps, 1))
    if temp.shape[0] > 0:
        t_melt = params[6] if np.isfinite(params[6]) else params[4]
        x[0], x[1], x[2] = params[4], t_melt, params[5]
        pack0[0] = 0.0
        _snow_kernel(
            inflow,
            temp[basin].reshape((n_steps, 1)),
            x[0:1],
            x[1:2],
            x[2:3],
            pack0,
            liquid,
            pack,
            melt,
        )
        inflow = liquid
    capacity = params[0] + params[2]
    total = 0.5 * capacity if np.isnan(start) else min(start, capacity)
    share = min(total / capacity, 1.0)
    s0[0] = share * params[0]
    r0[0] = share * params[2]
    for i in range(4):
        x[i] = params[i]
    _gr4j_kernel(
        inflow,
        pet[basin].reshape((n_steps, 1)),
        x[0:1],
        x[1:2],
        x[2:3],
        x[3:4],
        s0,
        r0,
        flow,
        skip,
        skip,
        skip,
        skip,
        skip,
    )
    score = _score(
        objective,
        flow[first:, 0],
        obs_a[basin],
        obs_b[basin],
        ss_a[basin],
        ss_b[basin],
        mean_obs[basin],
        offset[basin],
    )
    return -score if np.isfinite(score) else FAILED_SCORE


@numba.njit(cache=True, nogil=True)
def _buffers(n_steps):  # pragma: no cover - compiled
    """Work arrays of one energy (reused for every run of a basin): the flow only, as the
    kernel skips the outputs given as (0, 0) arrays."""
    column = (n_steps, 1)
    return (
        np.empty(7),
        np.empty(4),
        np.empty(1),
        np.empty(1),
        np.empty(1),
        np.empty(column),
        np.empty(column),
        np.empty(column),
        np.empty(column),
        np.empty((0, 0)),
    )


@numba.njit(cache=True, nogil=True)
def _energies(units, basins, out, *problem):  # pragma: no cover - compiled
    buffers = _buffers(problem[0].shape[1])
    for i in range(units.shape[0]):
        out[i] = _energy(units[i], basins[i], buffers, problem)


@numba.njit(cache=True, nogil=True)
def _descents(
    basins, starts, start_energies, budgets, best, energies, runs, *problem
):  # pragma: no cover
    """One Nelder-Mead descent per basin, every run compiled; the best point of each."""
    buffers = _buffers(problem[0].shape[1])
    n_dims = starts.shape[1]
    values = np.empty(n_dims + 1)
    point = np.empty(n_dims)
    box_lower, box_span = problem[16], problem[17]
    for k in range(basins.shape[0]):
        simplex, simplex_energies, pending, work, memo, state = new_descent(n_dims)
        n = begin_descent(
            starts[k],
            start_energies[k],
            budgets[k],
            simplex,
            simplex_energies,
            pending,
            work,
            memo,
            state,
        )
        energies[k] = start_energies[k]
        best[k, :] = starts[k]
        while n > 0:
            for i in range(n):
                for j in range(n_dims):
                    point[j] = box_lower[j] + pending[i, j] * box_span[j]
                values[i] = _energy(point, basins[k], buffers, problem)
                runs[k] += 1
                if values[i] < energies[k]:
                    energies[k] = values[i]
                    best[k, :] = pending[i]
            n = tell_descent(values[:n], simplex, simplex_energies, pending, work, memo, state)
