"""Searches of a box for the lowest energy, for functions that score many points in one call.

An energy function takes an (n_dims, m) array (m points as columns) and returns m energies; one
point is one model run. Two searches share that contract and return a :class:`SearchResult`
with the number of runs spent:

- :func:`screen_and_descend` (the ``fast`` search): a scrambled, seeded Sobol sequence (Sobol
  1967; Owen 1998 scrambling, ``scipy.stats.qmc.Sobol``) screens the box in one call, then the
  Nelder-Mead simplex (Nelder and Mead 1965; points clipped to the box) descends from the best
  few distinct screened points at once, one point per simplex in each call, within a budget of
  runs. Screening a fixed spread of points
  before a local search is common practice for rainfall-runoff models with four to seven
  parameters (a coarse screening before a local descent; common practice, no source);
- :func:`evolve_and_polish` (the ``thorough`` search): differential evolution (Storn and Price
  1997, ``scipy.optimize.differential_evolution``), the population scored in one call per
  generation, then a compass search (Kolda, Lewis and Torczon 2003) polishes the best member.

Pure numpy and scipy; nothing here knows of models or files. All searches are deterministic
for a given seed.

References
----------
Sobol, I. M. (1967): On the distribution of points in a cube and the approximate evaluation of
integrals, USSR Comput. Math. Math. Phys. 7(4), 86-112. Owen, A. B. (1998): Scrambling Sobol'
and Niederreiter-Xing points, J. Complexity 14, 466-489. Nelder, J. A., Mead, R. (1965): A
simplex method for function minimization, Comput. J. 7, 308-313. Storn, R., Price, K. (1997):
Differential evolution - a simple and efficient heuristic for global optimization over
continuous spaces, J. Global Optim. 11, 341-359. Kolda, T. G., Lewis, R. M., Torczon, V.
(2003): Optimization by direct search: new perspectives on some classical and modern methods,
SIAM Review 45(3), 385-482.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
from scipy.optimize import differential_evolution
from scipy.stats import qmc

Energy = Callable[[np.ndarray], np.ndarray]
ManyEnergy = Callable[[np.ndarray, np.ndarray], np.ndarray]

MAX_POINTS_PER_CALL = 256
"""Points scored in one call at most (one model run each: bounds the memory of a call)."""
SCREEN_POINTS_PER_DIMENSION = 16
"""Sobol points per searched dimension, rounded up to a power of two (4 dimensions: 64)."""
MIN_DESCENT = 50
"""A further descent starts only with at least this many runs of the budget left."""
START_SEPARATION = 0.25
"""Least distance between two descents' starts, as a share of the unit cube's diagonal."""
SIMPLEX_STEP = 0.1
"""Edge of the first simplex, as a share of each dimension's range."""
SIMPLEX_XATOL = 1e-4
"""Nelder-Mead stops when the simplex is this small (share of each range) ..."""
SIMPLEX_FATOL = 1e-5
"""... and its energies agree to this (absolute; scores are dimensionless)."""
DE_TOLERANCE = 1e-4
"""Relative spread of the population's energies at which differential evolution stops."""
POLISH_START_STEP = 0.02
"""First step of the compass search, as a share of each dimension's range."""
POLISH_MIN_STEP = 1e-5
"""The compass search stops when every step is below this share of the range."""
POLISH_MAX_ROUNDS = 60
"""At most this many compass-search rounds."""


@dataclass(frozen=True)
class SearchResult:
    """Outcome of one search.

    Attributes
    ----------
    x : ndarray, shape (n_dims,)
        Best point found, in the coordinates of the box.
    energy : float
        Its energy.
    n_runs : int
        Points scored in all (model runs).
    """

    x: np.ndarray
    energy: float
    n_runs: int


class _Counted:
    """Energies of several problems' points, counting the runs and keeping each one's best."""

    def __init__(self, energy: ManyEnergy, n_dims: int, n_problems: int) -> None:
        self.energy = energy
        self.n_dims = n_dims
        self.n_runs = np.zeros(n_problems, dtype=np.int64)
        self.best_x = np.full((n_problems, n_dims), np.nan)
        self.best_energy = np.full(n_problems, np.inf)

    def __call__(self, points: np.ndarray, owner: np.ndarray | None = None) -> np.ndarray:
        points = np.asarray(points, dtype=float).reshape(self.n_dims, -1)
        owner = np.zeros(points.shape[1], dtype=np.int64) if owner is None else owner
        values = np.empty(points.shape[1])
        for part in _parts(points.shape[1]):
            values[part] = self.energy(points[:, part], owner[part])
        values = np.where(np.isfinite(values), values, np.inf)
        self.n_runs += np.bincount(owner, minlength=len(self.n_runs))
        for problem in np.unique(owner):
            mine = np.flatnonzero(owner == problem)
            i = mine[int(np.argmin(values[mine]))]
            if values[i] < self.best_energy[problem]:
                self.best_x[problem] = points[:, i]
                self.best_energy[problem] = values[i]
        return values

    def results(self) -> list[SearchResult]:
        return [
            SearchResult(x, float(e), int(n))
            for x, e, n in zip(self.best_x, self.best_energy, self.n_runs, strict=True)
        ]


def _parts(n: int) -> list[slice]:
    """Slices of at most :data:`MAX_POINTS_PER_CALL` points (bounds the memory of one call)."""
    return [slice(i, min(i + MAX_POINTS_PER_CALL, n)) for i in range(0, n, MAX_POINTS_PER_CALL)]


def _check_box(lower, upper) -> tuple[np.ndarray, np.ndarray]:
    lower = np.asarray(lower, dtype=float)
    upper = np.asarray(upper, dtype=float)
    if lower.ndim != 1 or lower.shape != upper.shape or not (upper > lower).all():
        raise ValueError("lower and upper must be 1-D of equal length with upper > lower")
    return lower, upper


def screen_and_descend(
    energy: ManyEnergy,
    lower: np.ndarray,
    upper: np.ndarray,
    *,
    n_problems: int,
    seed: int,
    max_runs: int,
    n_starts: int = 2,
    start: np.ndarray | None = None,
) -> list[SearchResult]:
    """Sobol screening of the box, then Nelder-Mead from the best screened points, for several
    problems at once (e.g. one per basin: the same box, each its own energy).

    Parameters
    ----------
    energy : callable
        ``energy(points, owner)``: points (n_dims, m) and the problem of each, owner (m,) int
        -> (m,) energies, lower is better; non-finite values are never chosen.
    lower, upper : ndarray, shape (n_dims,)
        The box.
    n_problems : int
        Number of problems; every call mixes points of several problems.
    seed : int
        Seed of the Sobol scrambling (the only random element): every problem is screened with
        the same points.
    max_runs : int
        Budget of points scored per problem after the screening, shared by its descents; each
        descent stops earlier when its simplex has converged.
    n_starts : int, default 2
        Descents per problem, one after the other from its best screened points that lie apart
        (see :func:`_distinct`), while at least :data:`MIN_DESCENT` runs of its budget are left;
        the k-th descents of all problems run in lockstep, one point per simplex in each call.
    start : ndarray, optional
        A point scored with the screening (e.g. the model's default values).

    Returns
    -------
    list of SearchResult
        One per problem.
    """
    lower, upper = _check_box(lower, upper)
    span = upper - lower
    counted = _Counted(energy, len(lower), n_problems)
    points = _sobol_points(len(lower), seed)
    if start is not None:
        points = np.vstack([(np.clip(start, lower, upper) - lower) / span, points])
    n_points = len(points)
    owner = np.repeat(np.arange(n_problems), n_points)
    values = counted((lower + np.tile(points, (n_problems, 1)) * span).T, owner)
    ranked = []
    for mine in values.reshape(n_problems, n_points):
        order = np.argsort(mine, kind="stable")[: int(np.isfinite(mine).sum())]
        ranked.append(_distinct(points[order], n_starts))
    for k in range(n_starts):
        # the k-th descent of every problem that has a k-th start and budget left, in lockstep
        left = max_runs - (counted.n_runs - n_points)
        owners = [p for p in range(n_problems) if len(ranked[p]) > k and left[p] > MIN_DESCENT]
        if not owners:
            break
        starts = np.array([ranked[p][k] for p in owners])
        budget = np.zeros(n_problems, dtype=np.int64)
        budget[owners] = left[owners] - (len(lower) + 1)
        _descend_together(counted, starts, np.array(owners), lower, span, budget)
    return counted.results()


def _distinct(ranked: np.ndarray, n: int) -> list[np.ndarray]:
    """The first ``n`` of the ranked unit-cube points that lie apart from those taken before
    (at least :data:`START_SEPARATION` of the cube's diagonal), so descents explore other basins
    of attraction rather than the same one."""
    taken: list[np.ndarray] = []
    diagonal = np.sqrt(ranked.shape[1])
    for point in ranked:
        if len(taken) == n:
            break
        if all(np.linalg.norm(point - other) >= START_SEPARATION * diagonal for other in taken):
            taken.append(point)
    return taken


def _sobol_points(n_dims: int, seed: int) -> np.ndarray:
    """Scrambled Sobol points in the unit cube: 16 per dimension, rounded up to a power of 2."""
    m = int(np.ceil(np.log2(SCREEN_POINTS_PER_DIMENSION * n_dims)))
    return qmc.Sobol(n_dims, scramble=True, seed=seed).random_base2(m)


def _descend_together(
    counted: _Counted, starts: np.ndarray, owner: np.ndarray, lower, span, budget: np.ndarray
) -> None:
    """Nelder-Mead (1965) from every start at once, in the unit cube; ``counted`` keeps the best.

    The simplices (of all problems) move in lockstep so each step scores one point per simplex
    in one call: reflect; then expand, contract outside or contract inside; shrink when the
    contraction fails (standard coefficients 1, 2, 1/2, 1/2; points clipped to the cube). A
    simplex stops when it spans at most :data:`SIMPLEX_XATOL` of every range and its energies
    agree to :data:`SIMPLEX_FATOL`; a problem's simplices stop before a step could take its
    runs (beyond the first simplices) past ``budget[problem]``.
    """
    n_simplices, n_dims = starts.shape

    def score(units: np.ndarray, rows: np.ndarray) -> np.ndarray:
        return counted((lower + np.clip(units, 0.0, 1.0) * span).T, owner[rows])

    toward_inside = np.where(starts < 0.5, 1.0, -1.0)
    simplex = np.repeat(starts[:, None, :], n_dims + 1, axis=1)
    simplex[:, 1:, :] += SIMPLEX_STEP * toward_inside[:, None, :] * np.eye(n_dims)
    simplex = np.clip(simplex, 0.0, 1.0)
    every = np.repeat(np.arange(n_simplices), n_dims + 1)
    energies = score(simplex.reshape(-1, n_dims), every).reshape(n_simplices, n_dims + 1)
    spent = np.zeros(len(budget), dtype=np.int64)
    active = np.ones(n_simplices, dtype=bool)
    while True:
        order = np.argsort(energies, axis=1, kind="stable")
        simplex = np.take_along_axis(simplex, order[:, :, None], axis=1)
        energies = np.take_along_axis(energies, order, axis=1)
        active &= ~_converged(simplex, energies)
        # a step costs at most 2 + n_dims runs a simplex
        worst_case = np.bincount(owner[active], minlength=len(budget)) * (2 + n_dims)
        active &= (spent + worst_case <= budget)[owner]
        rows = np.flatnonzero(active)
        if rows.size == 0:
            break
        spent += _step(score, simplex, energies, rows, len(budget), owner)


def _converged(simplex: np.ndarray, energies: np.ndarray) -> np.ndarray:
    size = np.abs(simplex[:, 1:, :] - simplex[:, :1, :]).max(axis=(1, 2))
    spread = np.abs(energies[:, 1:] - energies[:, :1]).max(axis=1)
    return (size <= SIMPLEX_XATOL) & (spread <= SIMPLEX_FATOL)


def _step(score, simplex, energies, rows, n_problems: int, owner) -> np.ndarray:
    """One Nelder-Mead step of the simplices ``rows`` (sorted, best first), in place.

    Returns the runs spent per problem.
    """
    centroid = simplex[rows, :-1, :].mean(axis=1)
    worst = simplex[rows, -1, :]
    reflected = np.clip(2.0 * centroid - worst, 0.0, 1.0)
    f_reflected = score(reflected, rows)
    best, second, last = energies[rows, 0], energies[rows, -2], energies[rows, -1]
    expand = f_reflected < best
    accept = ~expand & (f_reflected < second)
    outside = ~expand & ~accept & (f_reflected < last)
    inside = ~expand & ~accept & ~outside
    trial = np.where(expand[:, None], centroid + 2.0 * (reflected - centroid), reflected)
    trial = np.where(outside[:, None], centroid + 0.5 * (reflected - centroid), trial)
    trial = np.where(inside[:, None], centroid + 0.5 * (worst - centroid), trial)
    trial = np.clip(trial, 0.0, 1.0)
    f_trial = np.full(len(rows), np.inf)
    if (~accept).any():
        f_trial[~accept] = score(trial[~accept], rows[~accept])
    new, f_new = reflected.copy(), f_reflected.copy()
    take_trial = (expand & (f_trial < f_reflected)) | (outside & (f_trial <= f_reflected))
    take_trial |= inside & (f_trial < last)
    new[take_trial], f_new[take_trial] = trial[take_trial], f_trial[take_trial]
    shrink = (outside | inside) & ~take_trial
    simplex[rows[~shrink], -1, :] = new[~shrink]
    energies[rows[~shrink], -1] = f_new[~shrink]
    runs = np.ones(len(rows), dtype=np.int64) + ~accept
    if shrink.any():
        _shrink(score, simplex, energies, rows[shrink])
        runs[shrink] += simplex.shape[2]
    return np.bincount(owner[rows], weights=runs, minlength=n_problems).astype(np.int64)


def _shrink(score, simplex: np.ndarray, energies: np.ndarray, rows: np.ndarray) -> None:
    """Move every vertex but the best halfway towards it, and score them in one call."""
    n_dims = simplex.shape[2]
    best = simplex[rows, :1, :]
    simplex[rows, 1:, :] = best + 0.5 * (simplex[rows, 1:, :] - best)
    vertices = simplex[rows, 1:, :].reshape(-1, n_dims)
    energies[rows, 1:] = score(vertices, np.repeat(rows, n_dims)).reshape(len(rows), -1)


def evolve_and_polish(
    energy: Energy,
    lower: np.ndarray,
    upper: np.ndarray,
    *,
    seed: int,
    generations: int,
    popsize: int,
    start: np.ndarray | None = None,
) -> SearchResult:
    """Differential evolution over the box, then a compass-search polish of the best member.

    Parameters
    ----------
    energy : callable
        (n_dims, m) -> (m,) energies, lower is better.
    lower, upper : ndarray, shape (n_dims,)
        The box.
    seed : int
        Seed of differential evolution.
    generations : int
        Maximum generations; each is one call over ``popsize`` x n_dims points. The search stops
        earlier when the population's energies agree to :data:`DE_TOLERANCE` relative.
    popsize : int
        Population per dimension (scipy's ``popsize``).
    start : ndarray, optional
        A member of the first population (e.g. the model's default values).
    """
    lower, upper = _check_box(lower, upper)
    counted = _Counted(lambda points, _owner: energy(points), len(lower), 1)
    found = differential_evolution(
        counted,
        bounds=list(zip(lower, upper, strict=True)),
        maxiter=generations,
        popsize=popsize,
        tol=DE_TOLERANCE,
        seed=seed,
        polish=False,
        init="latinhypercube",
        x0=None if start is None else np.clip(start, lower, upper),
        updating="deferred",
        vectorized=True,
    )
    compass_polish(
        counted,
        np.asarray(found.x),
        float(found.fun),
        lower,
        upper,
        population=getattr(found, "population", None),
    )
    return counted.results()[0]


def compass_polish(energy, best_x, best_energy, lower, upper, population=None):
    """Compass search (Kolda et al. 2003) along the axes and the population's principal axes.

    Works in coordinates scaled to the bounds. Each round tries +/- one step along every
    direction in one call: the axes and, when the final population is given, the eigenvectors
    of its covariance, which follow the valleys that parameter interplay carves across the
    axes. The best improving trial is taken and the step doubled (up to its start); when none
    improves, the step is halved.

    Returns
    -------
    best_x, best_energy
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
        trials = np.clip(best_x + directions * step * span, lower, upper)
        energies = energy(trials.T)
        i = int(np.argmin(energies))
        if energies[i] < best_energy:
            best_x, best_energy = trials[i], float(energies[i])
            step = min(2.0 * step, POLISH_START_STEP)
        else:
            step = step / 2.0
    return best_x, best_energy
