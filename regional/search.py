"""Searches of a box for the lowest energy, for functions that score many points in one call.

An energy function takes an (n_dims, m) array (m points as columns) and returns m energies; one
point is one model run. Two searches share that contract and return a :class:`SearchResult`
with the number of runs spent:

- :func:`screen_and_descend` (the ``fast`` search): a scrambled, seeded Sobol sequence (Sobol
  1967; Owen 1998 scrambling, ``scipy.stats.qmc.Sobol``) screens the box in one call, then the
  Nelder-Mead simplex (Nelder and Mead 1965; points clipped to the box) descends from the best
  three distinct screened points, each descent stopped early, and restarts from the best point
  found, within a budget of runs. The descents of many problems move in lockstep (one call
  per step) or, given a compiled energy, run in a compiled loop per problem
  (:mod:`regional.compiled_search`): Nelder-Mead is written as a compiled state machine
  (:func:`begin_descent`, :func:`tell_descent`) whose caller scores the pending points.
  Screening a fixed spread of points before a local search is common practice for
  rainfall-runoff models with four to seven parameters (common practice, no source);
- :func:`evolve_and_polish` (the ``thorough`` search): differential evolution (Storn and Price
  1997, ``scipy.optimize.differential_evolution``), the population scored in one call per
  generation, then a compass search (Kolda, Lewis and Torczon 2003) polishes the best member.

Numpy, numba and scipy; nothing here knows of models or files. All searches are deterministic
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

import numba
import numpy as np

Energy = Callable[[np.ndarray], np.ndarray]
ManyEnergy = Callable[[np.ndarray, np.ndarray], np.ndarray]
Descend = Callable[[np.ndarray, np.ndarray, np.ndarray], tuple[np.ndarray, np.ndarray, np.ndarray]]

MAX_POINTS_PER_CALL = 256
"""Points scored in one call at most (one model run each: bounds the memory of a call)."""
SCREEN_POINTS_PER_DIMENSION = 16
"""Sobol points per searched dimension, rounded up to a power of two (4 dimensions: 64)."""
MIN_DESCENT = 50
"""A further descent starts only with at least this many runs of the budget left."""
SCREENED_DESCENTS = 3
"""Descents from distinct screened points before the restart from the best point found."""
DESCENT_RUNS_PER_DIMENSION = 15
"""Each descent from a screened point stops after this many runs per dimension (beyond its
first simplex): enough to tell a promising valley, leaving the rest to the final restart."""
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

    def add(self, problems, best_x, best_energy, runs) -> None:
        """Count runs made elsewhere and keep their best points (rows of ``best_x``)."""
        self.n_runs[problems] += runs
        better = best_energy < self.best_energy[problems]
        self.best_x[problems[better]] = best_x[better]
        self.best_energy[problems[better]] = best_energy[better]

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
    n_starts: int = SCREENED_DESCENTS,
    start: np.ndarray | None = None,
    descend: Descend | None = None,
) -> list[SearchResult]:
    """Sobol screening of the box, then Nelder-Mead from the best screened points and a restart
    from the best point found, for several problems at once (e.g. one per basin: the same box,
    each its own energy).

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
        Budget of points scored per problem after the screening, shared by its descents.
    n_starts : int, default :data:`SCREENED_DESCENTS`
        Descents from the best screened points that lie apart (see :func:`_distinct`), one
        after the other, each stopped after :data:`DESCENT_RUNS_PER_DIMENSION` x n_dims runs
        beyond its first simplex (or earlier, converged); then one descent restarts from the
        best point found with a fresh simplex and the rest of the budget. A descent starts only
        while at least :data:`MIN_DESCENT` runs of the budget are left.
    start : ndarray, optional
        A point scored with the screening (e.g. the model's default values).
    descend : callable, optional
        ``descend(problems, starts, start_energies, budgets)`` runs the descents of
        :func:`begin_descent` and :func:`tell_descent` itself, one per problem (starts in the
        unit cube, budgets of runs after the first simplex), e.g. compiled together with the
        problem's energy; returns each one's best unit point, its energy and the runs spent.
        Default: the descents of all problems in lockstep, one call of ``energy`` per step.

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
    ranked = [_distinct(points, mine, n_starts) for mine in values.reshape(n_problems, -1)]
    cap = DESCENT_RUNS_PER_DIMENSION * len(lower)
    for k in range(n_starts + 1):
        # one descent of every problem with a start and budget left, in lockstep
        left = max_runs - (counted.n_runs - n_points)
        owners = np.array([p for p in range(n_problems) if left[p] > MIN_DESCENT], dtype=int)
        if k < n_starts:
            owners = np.array([p for p in owners if len(ranked[p][0]) > k], dtype=int)
            starts = np.array([ranked[p][0][k] for p in owners]).reshape(-1, len(lower))
            energies = np.array([ranked[p][1][k] for p in owners])
            budget = np.minimum(left[owners] - len(lower), cap)
        else:
            owners = owners[np.isfinite(counted.best_energy[owners])]
            starts = np.clip((counted.best_x[owners] - lower) / span, 0.0, 1.0)
            energies = counted.best_energy[owners]
            budget = left[owners] - len(lower)
        if owners.size == 0:
            continue
        if descend is None:
            _descend_together(counted, starts, energies, owners, lower, span, budget)
        else:
            best, found, runs = descend(owners, starts, energies, budget)
            counted.add(owners, lower + best * span, found, runs)
    return counted.results()


def _distinct(points: np.ndarray, energies: np.ndarray, n: int):
    """The ``n`` best of the unit-cube points (finite energies) that lie apart from better ones
    taken before (at least :data:`START_SEPARATION` of the cube's diagonal), so descents explore
    other basins of attraction rather than the same one; with their energies."""
    order = np.argsort(energies, kind="stable")[: int(np.isfinite(energies).sum())]
    taken: list[int] = []
    diagonal = np.sqrt(points.shape[1])
    for i in order:
        if len(taken) == n:
            break
        if all(
            np.linalg.norm(points[i] - points[j]) >= START_SEPARATION * diagonal for j in taken
        ):
            taken.append(i)
    return points[taken], energies[taken]


def _sobol_points(n_dims: int, seed: int) -> np.ndarray:
    """Scrambled Sobol points in the unit cube: 16 per dimension, rounded up to a power of 2."""
    from scipy.stats import qmc  # here, not at the top: prediction imports no scipy.stats

    m = int(np.ceil(np.log2(SCREEN_POINTS_PER_DIMENSION * n_dims)))
    return qmc.Sobol(n_dims, scramble=True, seed=seed).random_base2(m)


def _descend_together(
    counted: _Counted, starts, start_energies, owner, lower, span, budget: np.ndarray
) -> None:
    """Nelder-Mead (1965) from every start at once, in the unit cube; ``counted`` keeps the best.

    The descents (:func:`begin_descent`, :func:`tell_descent`; one per start, of the problems
    ``owner``, starting from points of known energies) move in lockstep so each step scores
    every pending point in one call. A descent stops before a step could take its runs (beyond
    the first simplex) past its ``budget``.
    """
    n_dims = starts.shape[1]
    states = [new_descent(n_dims) for _ in starts]
    pending = np.array(
        [
            begin_descent(x, f, b, *s)
            for x, f, b, s in zip(starts, start_energies, budget, states, strict=True)
        ]
    )
    while (pending > 0).any():
        rows = np.flatnonzero(pending)
        units = np.concatenate([states[i][2][: pending[i]] for i in rows])
        values = counted((lower + units * span).T, np.repeat(owner[rows], pending[rows]))
        for i, mine in zip(rows, np.split(values, np.cumsum(pending[rows])[:-1]), strict=True):
            pending[i] = tell_descent(mine, *states[i])


# Nelder-Mead as a compiled state machine: the caller scores the pending points and tells their
# energies back, so the same steps run in lockstep over many problems (one call of the energy
# per step, :func:`_descend_together`) or in a compiled loop over one problem's own compiled
# energy (no Python per step).
_PHASE, _PENDING, _SPENT, _BUDGET, _KIND = range(5)
"""Slots of a descent's integer state (spent: runs after the first simplex)."""
_INIT, _REFLECT, _TRIAL, _SHRINK, _DONE = range(5)
"""Phases: pending are the first simplex, a reflection, a trial, a shrink; or nothing."""
_EXPAND, _OUTSIDE, _INSIDE = range(3)
"""Trials after a reflection that is not kept as it is."""


@numba.njit(cache=True, nogil=True)
def new_descent(n_dims):  # pragma: no cover - compiled
    """Arrays of one descent's state: simplex (d + 1, d), energies (d + 1,), pending points
    (d + 1, d), centroid and reflection (2, d), the reflection's energy (1,), integers (5,)."""
    return (
        np.zeros((n_dims + 1, n_dims)),
        np.zeros(n_dims + 1),
        np.zeros((n_dims + 1, n_dims)),
        np.zeros((2, n_dims)),
        np.zeros(1),
        np.zeros(5, dtype=np.int64),
    )


@numba.njit(cache=True, nogil=True)
def begin_descent(
    start, energy, budget, simplex, energies, pending, work, memo, state
):  # pragma: no cover - compiled
    """Start a descent at ``start`` (unit cube) of known ``energy``; returns the points pending
    (d: the other vertices of the first simplex, edges :data:`SIMPLEX_STEP` along each axis
    towards the cube's inside).

    ``budget``: runs the steps may take after the first simplex; a step that could pass it
    (2 + d runs at most) is not started. Then score ``pending[:n]`` and call
    :func:`tell_descent` until it returns 0.
    """
    n_dims = start.shape[0]
    for i in range(n_dims + 1):
        for j in range(n_dims):
            simplex[i, j] = start[j]
    for j in range(n_dims):
        toward = 1.0 if start[j] < 0.5 else -1.0
        simplex[j + 1, j] = min(max(start[j] + SIMPLEX_STEP * toward, 0.0), 1.0)
    pending[:n_dims, :] = simplex[1:]
    energies[0] = energy
    state[_PHASE] = _INIT
    state[_SPENT] = 0
    state[_BUDGET] = budget
    state[_PENDING] = n_dims
    return n_dims


@numba.njit(cache=True, nogil=True)
def tell_descent(values, simplex, energies, pending, work, memo, state):  # pragma: no cover
    """Take the energies of the pending points and move the simplex; returns the points now
    pending in ``pending`` (0: the descent has stopped, its best vertex is ``simplex[0]``).

    One step (coefficients 1, 2, 1/2, 1/2; points clipped to the cube): reflect the worst
    vertex through the centroid of the others; keep the reflection, or try an expansion, an
    outside or an inside contraction; shrink every vertex halfway to the best when the
    contraction fails. The descent stops when the simplex spans at most :data:`SIMPLEX_XATOL`
    of every range and its energies agree to :data:`SIMPLEX_FATOL`, or at the budget.
    """
    n_dims = simplex.shape[1]
    phase = state[_PHASE]
    if phase == _INIT:
        energies[1:] = values[:n_dims]
    elif phase == _REFLECT:
        if _after_reflection(values[0], simplex, energies, pending, work, memo, state):
            return 1
    elif phase == _TRIAL:
        if _after_trial(values[0], simplex, energies, pending, work, memo, state):
            return n_dims
    elif phase == _SHRINK:
        energies[1:] = values[:n_dims]
        state[_SPENT] += n_dims
    return _next_step(simplex, energies, pending, work, state)


@numba.njit(cache=True, nogil=True)
def _after_reflection(
    f_reflected, simplex, energies, pending, work, memo, state
):  # pragma: no cover
    """Keep the reflection (returns False), or set the trial pending (returns True)."""
    n_dims = simplex.shape[1]
    centroid, reflected = work[0], work[1]
    memo[0] = f_reflected
    if f_reflected < energies[0]:
        kind, base, factor = _EXPAND, reflected, 2.0
    elif f_reflected < energies[n_dims - 1]:
        simplex[n_dims, :] = reflected
        energies[n_dims] = f_reflected
        state[_SPENT] += 1
        return False
    elif f_reflected < energies[n_dims]:
        kind, base, factor = _OUTSIDE, reflected, 0.5
    else:
        kind, base, factor = _INSIDE, simplex[n_dims], 0.5
    for j in range(n_dims):
        trial = centroid[j] + factor * (base[j] - centroid[j])
        pending[0, j] = min(max(trial, 0.0), 1.0)
    state[_KIND] = kind
    state[_PHASE] = _TRIAL
    state[_PENDING] = 1
    return True


@numba.njit(cache=True, nogil=True)
def _after_trial(f_trial, simplex, energies, pending, work, memo, state):  # pragma: no cover
    """Keep the trial or the reflection (returns False), or set the shrink pending (True)."""
    n_dims = simplex.shape[1]
    kind, f_reflected = state[_KIND], memo[0]
    state[_SPENT] += 2
    take = (
        (kind == _EXPAND and f_trial < f_reflected)
        or (kind == _OUTSIDE and f_trial <= f_reflected)
        or (kind == _INSIDE and f_trial < energies[n_dims])
    )
    if take:
        simplex[n_dims, :] = pending[0]
        energies[n_dims] = f_trial
        return False
    if kind == _EXPAND:
        simplex[n_dims, :] = work[1]
        energies[n_dims] = f_reflected
        return False
    for i in range(1, n_dims + 1):
        for j in range(n_dims):
            simplex[i, j] = simplex[0, j] + 0.5 * (simplex[i, j] - simplex[0, j])
            pending[i - 1, j] = simplex[i, j]
    state[_PHASE] = _SHRINK
    state[_PENDING] = n_dims
    return True


@numba.njit(cache=True, nogil=True)
def _next_step(simplex, energies, pending, work, state):  # pragma: no cover
    """Sort the simplex; stop, or set the reflection of its worst vertex pending."""
    n_dims = simplex.shape[1]
    order = np.argsort(energies, kind="mergesort")
    simplex[:, :] = simplex[order]
    energies[:] = energies[order]
    size = np.abs(simplex[1:] - simplex[0]).max()
    spread = np.abs(energies[1:] - energies[0]).max()
    converged = size <= SIMPLEX_XATOL and spread <= SIMPLEX_FATOL
    if converged or state[_SPENT] + 2 + n_dims > state[_BUDGET]:
        state[_PHASE] = _DONE
        state[_PENDING] = 0
        return 0
    centroid, reflected = work[0], work[1]
    for j in range(n_dims):
        total = 0.0
        for i in range(n_dims):
            total += simplex[i, j]
        centroid[j] = total / n_dims
        reflected[j] = min(max(2.0 * centroid[j] - simplex[n_dims, j], 0.0), 1.0)
    pending[0, :] = reflected
    state[_PHASE] = _REFLECT
    state[_PENDING] = 1
    return 1


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
    from scipy.optimize import differential_evolution  # here: prediction needs no optimiser

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
