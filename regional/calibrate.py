"""Per-basin calibration of a storage model against observed flow.

For each gauged basin the chosen objective (NSE by default; KGE; log-NSE; a blend of NSE on flow
and on its square root) is maximised over the calibration period after the warm-up, and the
optimum is scored again on a separate validation period: the split-sample test of Klemes
(1986). One-parameter models use a bounded scalar search: a log-spaced grid evaluated in one
vectorised call brackets the optimum, then Brent's method (Brent 1973, as in
``scipy.optimize.minimize_scalar(method="bounded")``) refines it in the transformed space.
Models with several free parameters (GR4J; any model with the snow store, whose parameters are
calibrated with the model's) use one of two searches in the transformed space
(:mod:`regional.search`): ``fast`` (default), a seeded Sobol screening followed by Nelder-Mead
descents from three distinct screened points and a restart from the best, within a budget of
model runs (compiled whole for GR4J, :mod:`regional.compiled_search`); or ``thorough``,
differential evolution with the whole population simulated as columns of one call per
generation, then a compass-search polish. The model runs spent are
recorded per basin (``n_runs``). docs/calibration.md compares the two.

References
----------
Klemes, V. (1986): Operational testing of hydrological simulation models, Hydrol. Sci. J. 31(1),
13-24. Brent, R. P. (1973): Algorithms for Minimization without Derivatives, Prentice-Hall. The
multi-parameter searches' references are in :mod:`regional.search`.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd

from regional import metrics
from regional.compiled_search import FAILED_SCORE, ColumnProblem, column_problem
from regional.errors import InputError
from regional.models import Simulator, get_model, parameter_table, snow_parameters
from regional.search import SearchResult, evolve_and_polish, screen_and_descend

GRID_SIZE = 41
"""Grid points of the bracketing search over a one-parameter model's bounds."""
BRENT_XATOL = 1e-6
"""Brent's absolute tolerance in the transformed (e.g. log k) space."""
SEARCHES = ("fast", "thorough")
"""Searches for models with several free parameters (see :mod:`regional.search`)."""
DEFAULT_SEARCH = "fast"
"""Default multi-parameter search."""
RUNS_PER_PARAMETER = 60
"""Default budget of the fast search: model runs after the Sobol screening, per free parameter
(240 for GR4J, 360 with the snow store calibrated), and at least :data:`MIN_MAX_RUNS`."""
MIN_MAX_RUNS = 240
"""Least default budget of the fast search (models with two or three free parameters)."""
DEFAULT_BUDGET = 60
"""Default maximum generations of differential evolution (the thorough search)."""
DEFAULT_POPSIZE = 8
"""Default population of differential evolution, per free parameter (scipy's ``popsize``)."""
DEFAULT_SEED = 20240
"""Default seed of both searches: the same data give the same parameters."""

Period = tuple[str | pd.Timestamp, str | pd.Timestamp]


@dataclass(frozen=True)
class Window:
    """Where one basin's simulation starts and which steps each period scores.

    Attributes
    ----------
    start, stop : int
        Positions in the record of the first simulated day and one past the last.
    warmup_days : int
        Leading simulated days that only spin up the stores.
    calibration, validation : ndarray of bool, shape (stop - start,)
        Days scored in each period (never inside the warm-up); validation all False if absent.
    """

    start: int
    stop: int
    warmup_days: int
    calibration: np.ndarray
    validation: np.ndarray


def scoring_window(
    dates: pd.DatetimeIndex,
    calibration: Period,
    validation: Period | None = None,
    *,
    warmup_days: int = 365,
) -> Window:
    """Place the warm-up before the earliest period and mark the scored days.

    The simulation starts ``warmup_days`` before the first scored period, or at the first date of
    the record when the record is shorter; the warm-up is then the first ``warmup_days`` days of
    the record and is never scored.

    Parameters
    ----------
    dates : DatetimeIndex
        Daily, continuous dates of the record.
    calibration, validation : (start, end)
        Inclusive date bounds; validation is optional.
    warmup_days : int, default 365
        Days of spin-up before the first scored day.
    """
    cal = _period_mask(dates, calibration, "calibration")
    val = _period_mask(dates, validation, "validation") if validation else np.zeros_like(cal)
    scored = np.flatnonzero(cal | val)
    first, last = scored[0], scored[-1]
    start = max(0, first - warmup_days)
    warmup = warmup_days if first - warmup_days >= 0 else min(warmup_days, last)
    keep = np.arange(start, last + 1) >= start + warmup
    return Window(
        start=start,
        stop=last + 1,
        warmup_days=warmup,
        calibration=cal[start : last + 1] & keep,
        validation=val[start : last + 1] & keep,
    )


def _period_mask(dates: pd.DatetimeIndex, period: Period, name: str) -> np.ndarray:
    try:
        begin, end = (pd.Timestamp(day) for day in period)
    except (TypeError, ValueError) as error:
        raise InputError(
            f'{name} period {period!r} is not a pair of dates; give ["YYYY-MM-DD", "YYYY-MM-DD"]'
        ) from error
    if begin > end:
        raise InputError(f"{name} period starts after it ends: {begin.date()} > {end.date()}")
    mask = np.asarray((dates >= begin) & (dates <= end))
    if not mask.any():
        raise InputError(
            f"{name} period {begin.date()}..{end.date()} lies outside the record "
            f"{dates[0].date()}..{dates[-1].date()}; choose dates inside it"
        )
    return mask


def calibrate(
    precip_mm: pd.DataFrame,
    pet_mm: pd.DataFrame,
    flow_mm: pd.DataFrame,
    *,
    model: str = "linear",
    temp_c: pd.DataFrame | None = None,
    objective: str = "nse",
    calibration: Period | None = None,
    validation: Period | None = None,
    warmup_days: int = 365,
    initial_storage: float | None = None,
    fixed_params: Mapping[str, float] | None = None,
    basins: Sequence[str] | None = None,
    progress: Callable[[int, int], None] | None = None,
    budget: int = DEFAULT_BUDGET,
    popsize: int = DEFAULT_POPSIZE,
    seed: int = DEFAULT_SEED,
    search: str = DEFAULT_SEARCH,
    max_runs: int | None = None,
) -> pd.DataFrame:
    """Calibrate ``model`` at every gauged basin and score it on a validation period.

    Parameters
    ----------
    precip_mm, pet_mm, flow_mm : DataFrame
        Daily series, dates (continuous DatetimeIndex) x basin_id, mm/day; NaN flow = missing.
    model : str, default "linear"
        Storage model name.
    temp_c : DataFrame, optional
        Daily mean temperature, degC, same shape: puts the degree-day snow store in front, and
        its parameters (``snow_threshold_c``, ``melt_factor_mm_per_degc_day``) are calibrated
        with the model's unless held in ``fixed_params``.
    objective : {"nse", "kge", "log_nse", "nse_blend"}, default "nse"
        Score maximised over the calibration period (the default chosen by leave-one-out on
        real basins: docs/validation.md).
    calibration, validation : (start, end), optional
        Inclusive dates. Default calibration: the whole record; validation optional.
    warmup_days : int, default 365
        Spin-up days before the first scored day (never scored).
    initial_storage : float, optional
        Storage at the simulation start, mm; default the store's equilibrium (see simulate).
    fixed_params : mapping, optional
        Values held fixed (not calibrated), e.g. snow parameters (``melt_threshold_c`` sets a
        melt threshold apart from the snowfall threshold).
    basins : sequence of str, optional
        Basins to calibrate; default every column of ``flow_mm`` with observed calibration days.
    progress : callable(done, total), optional
        Called after each basin.
    budget : int, default 60
        Thorough search only: maximum generations of differential evolution. Each generation is
        one simulate call over ``popsize`` x (free parameters) columns; the search stops earlier
        when the population's scores agree to 1e-4 relative.
    popsize : int, default 8
        Thorough search only: population size per free parameter (32 sets for GR4J).
    seed : int, default 20240
        Multi-parameter models only: seed of the search (reproducible results).
    search : {"fast", "thorough"}, default "fast"
        Multi-parameter models only: Sobol screening then Nelder-Mead descents (``fast``), or
        differential evolution then a compass polish (``thorough``); see docs/calibration.md.
    max_runs : int, optional
        Fast search only: model runs allowed after the screening (16 Sobol points per free
        parameter, rounded up to a power of two: 64 for GR4J); default 60 per free parameter
        and at least 240 (240 for GR4J, 360 with the snow store calibrated). Descents stop
        earlier once converged.

    Returns
    -------
    DataFrame
        Indexed by basin_id: one column per parameter of the model and, with temperature, of
        the snow store (e.g. ``k_per_day``; fixed ones keep their value),
        ``objective``, ``score_calibration``, ``score_validation``, ``n_days_calibration``,
        ``n_days_validation``, ``nse_``/``kge_`` of both periods, and ``n_runs`` (model runs the
        search spent).
    """
    chosen = get_model(model)
    search = _search_settings(search, budget, popsize, seed, max_runs)
    if objective not in metrics.OBJECTIVES:
        raise InputError(
            f"unknown objective {objective!r}; choose one of {', '.join(metrics.OBJECTIVES)}"
        )
    dates = pd.DatetimeIndex(flow_mm.index)
    window = scoring_window(
        dates, calibration or (dates[0], dates[-1]), validation, warmup_days=warmup_days
    )
    ids = _basins_to_calibrate(flow_mm, window, basins)
    part = slice(window.start, window.stop)
    simulator = Simulator(
        chosen.name,
        precip_mm[ids].to_numpy(dtype=float)[part],
        pet_mm[ids].to_numpy(dtype=float)[part],
        temp=None if temp_c is None else temp_c[ids].to_numpy(dtype=float)[part],
        initial_storage=initial_storage,
        warmup_days=window.warmup_days,
    )
    obs = flow_mm[ids].to_numpy(dtype=float)[part]
    problem = _Problem(chosen, simulator, obs, window, objective, dict(fixed_params or {}))
    best, n_runs = _search_all(problem, search, len(ids))
    flows = problem.flows(best)
    rows = []
    for column, values in enumerate(best):
        scores = _period_scores(obs[:, column], flows[:, column], window, objective)
        rows.append({**values, **scores, "n_runs": int(n_runs[column]) + 1})
        if progress is not None:
            progress(column + 1, len(ids))
    table = pd.DataFrame(rows, index=pd.Index(ids, name="basin_id"))
    table.insert(len(problem.names), "objective", objective)
    return table


@dataclass(frozen=True)
class _SearchSettings:
    name: str
    budget: int
    popsize: int
    seed: int
    max_runs: int | None


def _search_settings(name, budget, popsize, seed, max_runs) -> _SearchSettings:
    if name not in SEARCHES:
        raise InputError(
            f"unknown calibration search {name!r}; choose one of {', '.join(SEARCHES)}"
        )
    for key, value, least in (
        ("budget", budget, 1),
        ("popsize", popsize, 2),
        ("seed", seed, 0),
        ("max_runs", 0 if max_runs is None else max_runs, 0),
    ):
        if isinstance(value, bool) or not isinstance(value, int | np.integer) or value < least:
            raise InputError(
                f"calibration setting {key} must be a whole number >= {least}: got {value!r}"
            )
    max_runs = None if max_runs is None else int(max_runs)
    return _SearchSettings(name, int(budget), int(popsize), int(seed), max_runs)


def _basins_to_calibrate(flow_mm: pd.DataFrame, window: Window, basins) -> list[str]:
    observed = flow_mm.iloc[window.start : window.stop].notna().to_numpy()
    counts = pd.Series(observed[window.calibration].sum(axis=0), index=flow_mm.columns)
    if basins is None:
        return [str(b) for b in counts.index[counts >= 2]]
    missing = [b for b in basins if b not in counts.index]
    if missing:
        raise InputError(f"no observed flow column for basin(s) {missing[:5]}")
    short = [b for b in basins if counts[b] < 2]
    if short:
        raise InputError(
            f"basin(s) {short[:5]} have fewer than 2 observed days in the calibration period; "
            "treat them as ungauged or widen the period"
        )
    return [str(b) for b in basins]


class _Problem:
    """The calibration of every basin: one energy over the free parameters' transformed space.

    ``energy(points, owner)`` scores parameter sets (columns of ``points``) of the basins
    ``owner`` (column positions in the forcing) in one simulation call: -objective over each
    basin's calibration days, :data:`FAILED_SCORE` where the score is undefined.
    """

    def __init__(self, chosen, simulator: Simulator, obs, window: Window, objective, fixed):
        snow = simulator.temp is not None
        table = parameter_table(chosen.name, snow=snow)
        known = [*table, *(snow_parameters(optional=True) if snow else ())]
        _check_fixed(fixed, known, chosen.name)
        self.free = [p for p in table if p.name not in fixed]
        self.names = [p.name for p in table]
        self.simulator = simulator
        scored = np.where(window.calibration[:, None], obs, np.nan)
        self.first = int(np.argmax(window.calibration)) if window.calibration.any() else 0
        self.score = metrics.objective_scorer(objective, scored[self.first :])
        self.constant = {p.name: p.initial for p in table} | {
            name: float(value) for name, value in fixed.items()
        }
        for parameter in self.free:
            self.constant.pop(parameter.name)
        self.column = None
        start = simulator.initial_storage
        if chosen.name == "gr4j" and (start is None or np.ndim(start) == 0):
            self.column = column_problem(
                simulator, scored[self.first :], objective, self.constant, self.free, self.first
            )

    def sets(self, points: np.ndarray) -> dict[str, np.ndarray]:
        points = np.asarray(points, dtype=float).reshape(len(self.free), -1)
        n = points.shape[1]
        sets = {name: np.full(n, value) for name, value in self.constant.items()}
        for parameter, row in zip(self.free, points, strict=True):
            sets[parameter.name] = np.clip(
                parameter.inverse(row), parameter.lower, parameter.upper
            )
        return sets

    def energy(self, points: np.ndarray, owner: np.ndarray) -> np.ndarray:
        flow = self.simulator.flow_of_sets(self.sets(points), columns=owner)
        scores = self.score(flow[self.first :], owner)
        return np.where(np.isfinite(scores), -scores, FAILED_SCORE)

    def flows(self, best: list[dict[str, float]]) -> np.ndarray:
        """Flow of every basin with its own parameters, mm/day (time, basins)."""
        n = len(best)
        sets = {name: np.full(n, value) for name, value in self.constant.items()}
        sets |= {name: np.array([values[name] for values in best]) for name in best[0]}
        return self.simulator.flow_of_sets(sets, columns=None)


def _check_fixed(fixed: dict, table, model: str) -> None:
    """Fixed values must name a parameter of the model (or snow store) and lie in its bounds."""
    known = {p.name: p for p in table}
    unknown = sorted(set(fixed) - set(known))
    if unknown:
        raise InputError(
            f"fixed parameter(s) {unknown} unknown for model {model!r}; known: {sorted(known)} "
            "(snow parameters need temperature)"
        )
    for name, value in fixed.items():
        parameter = known[name]
        if not parameter.lower <= float(value) <= parameter.upper:
            raise InputError(
                f"fixed parameter {name} = {value!r} {parameter.unit} is outside its bounds "
                f"[{parameter.lower}, {parameter.upper}]"
            )


def _search_all(problem: _Problem, search: _SearchSettings, n_basins: int):
    """Best values (parameter units, every model parameter) and runs spent, per basin."""
    free = problem.free
    lower = np.array([p.forward(p.lower) for p in free])
    upper = np.array([p.forward(p.upper) for p in free])
    start = np.clip([p.forward(p.initial) for p in free], lower, upper)
    if len(free) >= 2 and search.name == "fast":
        column: ColumnProblem | None = problem.column
        found = screen_and_descend(
            problem.energy if column is None else column.energy,
            lower,
            upper,
            n_problems=n_basins,
            seed=search.seed,
            max_runs=_default_runs(len(free)) if search.max_runs is None else search.max_runs,
            start=start,
            descend=None if column is None else column.descend,
        )
    else:
        found = [
            _search_one(problem, column, lower, upper, start, search) for column in range(n_basins)
        ]
    best = []
    for result in found:
        values = dict(problem.constant)
        for parameter, value in zip(free, result.x, strict=True):
            value = parameter.inverse(value) if np.isfinite(value) else parameter.initial
            values[parameter.name] = float(np.clip(value, parameter.lower, parameter.upper))
        best.append({name: values[name] for name in problem.names})
    return best, np.array([result.n_runs for result in found])


def _default_runs(n_free: int) -> int:
    """Default budget of the fast search after the screening, model runs per basin."""
    return max(RUNS_PER_PARAMETER * n_free, MIN_MAX_RUNS)


def _search_one(problem: _Problem, column: int, lower, upper, start, search) -> SearchResult:
    """One basin: Brent for one free parameter, differential evolution for several, or none."""

    def energy(points: np.ndarray) -> np.ndarray:
        points = np.asarray(points, dtype=float).reshape(len(lower), -1)
        return problem.energy(points, np.full(points.shape[1], column))

    if len(lower) == 0:
        return SearchResult(np.empty(0), np.nan, 0)
    if len(lower) == 1:
        return _scalar_search(energy, lower[0], upper[0])
    return evolve_and_polish(
        energy,
        lower,
        upper,
        seed=search.seed,
        generations=search.budget,
        popsize=search.popsize,
        start=start,
    )


def _scalar_search(energy, lower: float, upper: float) -> SearchResult:
    """Grid bracket then Brent's bounded method in the transformed space."""
    from scipy.optimize import minimize_scalar  # here: prediction imports no optimiser

    grid = np.linspace(lower, upper, GRID_SIZE)
    energies = energy(grid[None, :])
    i = int(np.argmin(energies))
    if not energies[i] < FAILED_SCORE:
        return SearchResult(np.array([np.nan]), np.inf, GRID_SIZE)
    left, right = grid[max(i - 1, 0)], grid[min(i + 1, GRID_SIZE - 1)]
    found = minimize_scalar(
        lambda x: energy(np.array([[x]]))[0],
        bounds=(left, right),
        method="bounded",
        options={"xatol": BRENT_XATOL},
    )
    best = found.x if found.fun <= energies[i] else grid[i]
    return SearchResult(
        np.array([best]), float(min(found.fun, energies[i])), GRID_SIZE + found.nfev
    )


def _period_scores(obs, flow, window: Window, objective: str) -> dict[str, float]:
    score_fn = metrics.OBJECTIVES[objective]
    out = {}
    for period in ("calibration", "validation"):
        mask = getattr(window, period)
        observed = np.where(mask, obs, np.nan)
        n_days = int(np.isfinite(observed).sum())
        if n_days < 2:
            out |= {f"score_{period}": np.nan, f"nse_{period}": np.nan, f"kge_{period}": np.nan}
        else:
            out |= {
                f"score_{period}": float(score_fn(observed, flow)),
                f"nse_{period}": float(metrics.nse(observed, flow)),
                f"kge_{period}": float(metrics.kge(observed, flow)),
            }
        out[f"n_days_{period}"] = n_days
    return out
