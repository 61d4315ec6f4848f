"""Per-basin calibration of a storage model against observed flow.

For each gauged basin the chosen objective (KGE by default; NSE; log-NSE) is maximised over the
calibration period after the warm-up, and the optimum is scored again on a separate validation
period: the split-sample test of Klemes (1986). One-parameter models use a bounded scalar search:
a log-spaced grid evaluated in one vectorised call brackets the optimum, then Brent's method
(Brent 1973, as in ``scipy.optimize.minimize_scalar(method="bounded")``) refines it in the
transformed space. Models with several free parameters (GR4J) use differential evolution (Storn
and Price 1997, ``scipy.optimize.differential_evolution``) in the transformed space, the whole
population simulated as columns of one call per generation, then a vectorised compass search
(Kolda, Lewis and Torczon 2003) polishes the best member.

References
----------
Klemes, V. (1986): Operational testing of hydrological simulation models, Hydrol. Sci. J. 31(1),
13-24. Brent, R. P. (1973): Algorithms for Minimization without Derivatives, Prentice-Hall.
Storn, R., Price, K. (1997): Differential evolution - a simple and efficient heuristic for global
optimization over continuous spaces, J. Global Optim. 11, 341-359. Kolda, T. G., Lewis, R. M.,
Torczon, V. (2003): Optimization by direct search: new perspectives on some classical and modern
methods, SIAM Review 45(3), 385-482.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy.optimize import differential_evolution, minimize_scalar

from regional import metrics
from regional.errors import InputError
from regional.models import get_model, simulate

GRID_SIZE = 41
"""Grid points of the bracketing search over a one-parameter model's bounds."""
BRENT_XATOL = 1e-6
"""Brent's absolute tolerance in the transformed (e.g. log k) space."""
DEFAULT_BUDGET = 60
"""Default maximum generations of differential evolution (multi-parameter models)."""
DEFAULT_POPSIZE = 8
"""Default population of differential evolution, per free parameter (scipy's ``popsize``)."""
DEFAULT_SEED = 20240
"""Default seed of differential evolution: the same data give the same parameters."""
DE_TOLERANCE = 1e-4
"""Relative spread of the population's scores at which differential evolution stops early."""
POLISH_START_STEP = 0.02
"""First step of the compass search, as a share of each transformed parameter's range."""
POLISH_MIN_STEP = 1e-5
"""The compass search stops when every step is below this share of the range."""
POLISH_MAX_ROUNDS = 60
"""At most this many compass-search rounds (2 x free parameters simulations each)."""
FAILED_SCORE = 1e10
"""Energy given to a parameter set whose score is undefined (NaN), so the search avoids it."""

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
    objective: str = "kge",
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
) -> pd.DataFrame:
    """Calibrate ``model`` at every gauged basin and score it on a validation period.

    Parameters
    ----------
    precip_mm, pet_mm, flow_mm : DataFrame
        Daily series, dates (continuous DatetimeIndex) x basin_id, mm/day; NaN flow = missing.
    model : str, default "linear"
        Storage model name.
    temp_c : DataFrame, optional
        Daily mean temperature, degC, same shape: puts the degree-day snow store in front.
    objective : {"kge", "nse", "log_nse"}, default "kge"
        Score maximised over the calibration period.
    calibration, validation : (start, end), optional
        Inclusive dates. Default calibration: the whole record; validation optional.
    warmup_days : int, default 365
        Spin-up days before the first scored day (never scored).
    initial_storage : float, optional
        Storage at the simulation start, mm; default the store's equilibrium (see simulate).
    fixed_params : mapping, optional
        Values held fixed (not calibrated), e.g. snow parameters.
    basins : sequence of str, optional
        Basins to calibrate; default every column of ``flow_mm`` with observed calibration days.
    progress : callable(done, total), optional
        Called after each basin.
    budget : int, default 60
        Multi-parameter models only: maximum generations of differential evolution. Each
        generation is one simulate call over ``popsize`` x (free parameters) columns; the search
        stops earlier when the population's scores agree to 1e-4 relative.
    popsize : int, default 8
        Multi-parameter models only: population size per free parameter (32 sets for GR4J).
    seed : int, default 20240
        Multi-parameter models only: seed of differential evolution (reproducible results).

    Returns
    -------
    DataFrame
        Indexed by basin_id: one column per model parameter (e.g. ``k_per_day``; fixed ones
        keep their value),
        ``objective``, ``score_calibration``, ``score_validation``, ``n_days_calibration``,
        ``n_days_validation``, and ``nse_``/``kge_`` of both periods.
    """
    chosen = get_model(model)
    search = _search_settings(budget, popsize, seed)
    if objective not in metrics.OBJECTIVES:
        raise InputError(
            f"unknown objective {objective!r}; choose one of {', '.join(metrics.OBJECTIVES)}"
        )
    dates = pd.DatetimeIndex(flow_mm.index)
    window = scoring_window(
        dates, calibration or (dates[0], dates[-1]), validation, warmup_days=warmup_days
    )
    ids = _basins_to_calibrate(flow_mm, window, basins)
    rows = []
    for done, basin in enumerate(ids, start=1):
        forcing = _basin_forcing(basin, precip_mm, pet_mm, temp_c, window)
        obs = flow_mm[basin].to_numpy(dtype=float)[window.start : window.stop]
        rows.append(
            _calibrate_one(
                chosen,
                forcing,
                obs,
                window,
                objective=objective,
                initial_storage=initial_storage,
                fixed_params=dict(fixed_params or {}),
                search=search,
            )
        )
        if progress is not None:
            progress(done, len(ids))
    table = pd.DataFrame(rows, index=pd.Index(ids, name="basin_id"))
    table.insert(len(chosen.parameters), "objective", objective)
    return table


@dataclass(frozen=True)
class _SearchSettings:
    budget: int
    popsize: int
    seed: int


def _search_settings(budget, popsize, seed) -> _SearchSettings:
    for name, value, least in (("budget", budget, 1), ("popsize", popsize, 2), ("seed", seed, 0)):
        if isinstance(value, bool) or not isinstance(value, int | np.integer) or value < least:
            raise InputError(
                f"calibration setting {name} must be a whole number >= {least}: got {value!r}"
            )
    return _SearchSettings(int(budget), int(popsize), int(seed))


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


def _basin_forcing(basin, precip_mm, pet_mm, temp_c, window: Window) -> dict[str, np.ndarray]:
    part = slice(window.start, window.stop)
    forcing = {
        "precip": precip_mm[basin].to_numpy(dtype=float)[part],
        "pet": pet_mm[basin].to_numpy(dtype=float)[part],
        "temp": None,
    }
    if temp_c is not None:
        forcing["temp"] = temp_c[basin].to_numpy(dtype=float)[part]
    return forcing


def _calibrate_one(
    chosen, forcing, obs, window, *, objective, initial_storage, fixed_params, search
):
    free = [p for p in chosen.parameters if p.name not in fixed_params]
    problem = (chosen.name, forcing, obs, window, objective, initial_storage, fixed_params)
    if len(free) == 1:
        best = {free[0].name: _scalar_search(free[0], *problem)}
    elif free:
        best = _global_search(free, *problem, search)
    else:
        best = {}
    params = {**fixed_params, **best}
    flow = _simulate_columns(chosen.name, forcing, params, window, initial_storage)[:, 0]
    values = {p.name: float(params[p.name]) for p in chosen.parameters}
    return {**values, **_period_scores(obs, flow, window, objective)}


def _simulate_columns(model, forcing, params, window, initial_storage) -> np.ndarray:
    result = simulate(
        model,
        forcing["precip"],
        forcing["pet"],
        params,
        temp=forcing["temp"],
        initial_storage=initial_storage,
        warmup_days=window.warmup_days,
    )
    return result.flow


def _scalar_search(parameter, model, forcing, obs, window, objective, initial_storage, fixed):
    score_fn = metrics.OBJECTIVES[objective]
    obs_cal = np.where(window.calibration, obs, np.nan)
    lo, hi = parameter.forward(parameter.lower), parameter.forward(parameter.upper)
    grid = np.linspace(lo, hi, GRID_SIZE)

    def evaluate(values_t: np.ndarray) -> np.ndarray:
        params = {**fixed, parameter.name: parameter.inverse(values_t)}
        flow = _simulate_columns(model, forcing, params, window, initial_storage)
        return np.atleast_1d(score_fn(obs_cal, flow))

    scores = evaluate(grid)
    if not np.isfinite(scores).any():
        return float(parameter.initial)
    i = int(np.nanargmax(scores))
    left, right = grid[max(i - 1, 0)], grid[min(i + 1, GRID_SIZE - 1)]
    found = minimize_scalar(
        lambda x: -evaluate(np.array([x]))[0],
        bounds=(left, right),
        method="bounded",
        options={"xatol": BRENT_XATOL},
    )
    best_t = found.x if -found.fun >= scores[i] else grid[i]
    return float(np.clip(parameter.inverse(best_t), parameter.lower, parameter.upper))


def _global_search(free, model, forcing, obs, window, objective, initial_storage, fixed, search):
    """Differential evolution over the free parameters, then a compass-search polish."""
    energy = _population_energy(
        free, model, forcing, obs, window, objective, initial_storage, fixed
    )
    lower = np.array([p.forward(p.lower) for p in free])
    upper = np.array([p.forward(p.upper) for p in free])
    start = np.clip([p.forward(p.initial) for p in free], lower, upper)
    found = differential_evolution(
        energy,
        bounds=list(zip(lower, upper, strict=True)),
        maxiter=search.budget,
        popsize=search.popsize,
        tol=DE_TOLERANCE,
        seed=search.seed,
        polish=False,
        init="latinhypercube",
        x0=start,
        updating="deferred",
        vectorized=True,
    )
    best_t, _ = _compass_polish(
        energy,
        np.asarray(found.x),
        float(found.fun),
        lower,
        upper,
        population=getattr(found, "population", None),
    )
    return {
        p.name: float(np.clip(p.inverse(value), p.lower, p.upper))
        for p, value in zip(free, best_t, strict=True)
    }


def _population_energy(free, model, forcing, obs, window, objective, initial_storage, fixed):
    """Objective of the search: -score for each column of an (n_free, m) array of sets."""
    score_fn = metrics.OBJECTIVES[objective]
    scored = np.flatnonzero(window.calibration & np.isfinite(obs))
    obs_scored = obs[scored]

    def energy(values_t: np.ndarray) -> np.ndarray:
        values_t = np.asarray(values_t, dtype=float).reshape(len(free), -1)
        params = dict(fixed)
        for parameter, row in zip(free, values_t, strict=True):
            params[parameter.name] = np.clip(
                parameter.inverse(row), parameter.lower, parameter.upper
            )
        flow = _simulate_columns(model, forcing, params, window, initial_storage)
        scores = np.atleast_1d(score_fn(obs_scored, flow[scored]))
        return np.where(np.isfinite(scores), -scores, FAILED_SCORE)

    return energy


def _compass_polish(energy, best_t, best_energy, lower, upper, population=None):
    """Compass search (Kolda et al. 2003) along the axes and the population's principal axes.

    Works in coordinates scaled to the bounds. Each round tries +/- one step along every
    direction in one call: the axes and, when the final population is given, the eigenvectors
    of its covariance, which follow the valleys that parameter interplay (e.g. X2 and X3)
    carves across the axes. The best improving trial is taken and the step doubled (up to its
    start); when none improves, the step is halved.
    """
    span = upper - lower
    directions = np.eye(len(span))
    if population is not None and len(population) > len(span):
        scaled = (np.asarray(population) - lower) / span
        _, vectors = np.linalg.eigh(np.cov(scaled, rowvar=False))
        directions = np.concatenate([directions, vectors.T])
    directions = np.concatenate([directions, -directions])
    step = POLISH_START_STEP
    for _ in range(POLISH_MAX_ROUNDS):
        if step < POLISH_MIN_STEP:
            break
        trials = np.clip(best_t + directions * step * span, lower, upper)
        energies = energy(trials.T)
        i = int(np.argmin(energies))
        if energies[i] < best_energy:
            best_t, best_energy = trials[i], float(energies[i])
            step = min(2.0 * step, POLISH_START_STEP)
        else:
            step = step / 2.0
    return best_t, best_energy


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
