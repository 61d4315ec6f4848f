"""The searches of regional.search on functions whose minimum is known."""

import numpy as np
import pytest

from regional.search import (
    begin_descent,
    evolve_and_polish,
    new_descent,
    screen_and_descend,
    tell_descent,
)

LOWER, UPPER = np.array([-2.0, -1.0, 0.0]), np.array([2.0, 3.0, 5.0])
CENTRES = np.array([[0.3, 1.7, 2.2], [-1.5, -0.2, 4.1], [1.9, 2.9, 0.4]])


def _bowls(points, owner):
    """One quadratic bowl per problem, its minimum 0 at CENTRES[problem] (worked here)."""
    scale = np.array([1.0, 4.0, 0.5])[:, None]
    return (scale * (points - CENTRES[owner].T) ** 2).sum(axis=0)


def test_fast_search_reaches_each_problems_minimum_within_its_budget():
    found = screen_and_descend(_bowls, LOWER, UPPER, n_problems=3, seed=1, max_runs=300)
    for result, centre in zip(found, CENTRES, strict=True):
        np.testing.assert_allclose(result.x, centre, atol=1e-3)
        assert result.energy < 1e-6
        assert result.n_runs <= 64 + 300


def test_fast_search_solves_a_problem_alone_as_in_company():
    # Problems share calls but not paths: basins calibrated in chunks of any size (in process
    # or on a cluster) get the same parameters.
    together = screen_and_descend(_bowls, LOWER, UPPER, n_problems=3, seed=4, max_runs=200)

    def third(points, owner):
        return _bowls(points, np.full_like(owner, 2))

    alone = screen_and_descend(third, LOWER, UPPER, n_problems=1, seed=4, max_runs=200)[0]
    np.testing.assert_array_equal(alone.x, together[2].x)
    assert alone.n_runs == together[2].n_runs


def test_fast_search_finds_the_deeper_of_two_valleys():
    # Two valleys (worked here): a wide shallow one (minimum 0.1) and a narrow deep one (0).
    def two_valleys(points, owner):
        x = points
        wide = 0.1 + 0.5 * ((x - np.array([[-1.0], [2.0], [4.0]])) ** 2).sum(axis=0)
        narrow = 2.0 * ((x - np.array([[1.5], [-0.5], [0.5]])) ** 2).sum(axis=0)
        return np.minimum(wide, narrow)

    one = screen_and_descend(two_valleys, LOWER, UPPER, n_problems=1, seed=2, max_runs=400)[0]
    assert one.energy < 1e-6
    np.testing.assert_allclose(one.x, [1.5, -0.5, 0.5], atol=1e-3)


def test_searches_are_seeded():
    first = screen_and_descend(_bowls, LOWER, UPPER, n_problems=3, seed=9, max_runs=100)
    again = screen_and_descend(_bowls, LOWER, UPPER, n_problems=3, seed=9, max_runs=100)
    for a, b in zip(first, again, strict=True):
        np.testing.assert_array_equal(a.x, b.x)

    def bowl(points):
        return _bowls(points, np.zeros(points.shape[1], dtype=int))

    de = [evolve_and_polish(bowl, LOWER, UPPER, seed=3, generations=20, popsize=5) for _ in "ab"]
    np.testing.assert_array_equal(de[0].x, de[1].x)
    assert de[0].n_runs == de[1].n_runs > 20 * 15


def test_bad_box_is_refused():
    with pytest.raises(ValueError, match="upper > lower"):
        screen_and_descend(_bowls, UPPER, LOWER, n_problems=1, seed=0, max_runs=10)


def _reference_descent(f, start, f_start, budget, step=0.1, xatol=1e-4, fatol=1e-5):
    """Plain-Python Nelder-Mead (Nelder and Mead 1965; coefficients 1, 2, 1/2, 1/2; points
    clipped to the unit cube) written from the textbook steps, as the reference for the
    compiled state machine. Returns the best vertex, its energy and the runs after the start."""
    d = len(start)
    simplex = [np.array(start, dtype=float)]
    for j in range(d):
        vertex = np.array(start, dtype=float)
        vertex[j] = min(max(start[j] + (step if start[j] < 0.5 else -step), 0.0), 1.0)
        simplex.append(vertex)
    values = [f_start] + [f(v) for v in simplex[1:]]
    spent = 0
    while True:
        order = sorted(range(d + 1), key=lambda i: values[i])  # stable, as the compiled sort
        simplex, values = [simplex[i] for i in order], [values[i] for i in order]
        size = max(abs(v - simplex[0]).max() for v in simplex[1:])
        spread = max(abs(v - values[0]) for v in values[1:])
        if (size <= xatol and spread <= fatol) or spent + 2 + d > budget:
            return simplex[0], values[0], d + spent
        centroid = sum(simplex[:-1][1:], simplex[0].copy()) / d
        worst = simplex[-1]
        reflected = np.clip(2.0 * centroid - worst, 0.0, 1.0)
        f_r = f(reflected)
        if values[0] <= f_r < values[-2]:
            simplex[-1], values[-1] = reflected, f_r
            spent += 1
            continue
        if f_r < values[0]:
            trial = np.clip(centroid + 2.0 * (reflected - centroid), 0.0, 1.0)
        elif f_r < values[-1]:
            trial = np.clip(centroid + 0.5 * (reflected - centroid), 0.0, 1.0)
        else:
            trial = np.clip(centroid + 0.5 * (worst - centroid), 0.0, 1.0)
        f_t = f(trial)
        spent += 2
        if f_r < values[0]:
            simplex[-1], values[-1] = (trial, f_t) if f_t < f_r else (reflected, f_r)
        elif (f_r < values[-1] and f_t <= f_r) or (f_r >= values[-1] and f_t < values[-1]):
            simplex[-1], values[-1] = trial, f_t
        else:
            simplex = [simplex[0]] + [simplex[0] + 0.5 * (v - simplex[0]) for v in simplex[1:]]
            values = [values[0]] + [f(v) for v in simplex[1:]]
            spent += d


@pytest.mark.parametrize("seed", range(6))
def test_compiled_descent_follows_the_reference_nelder_mead(seed):
    # Random problems (worked here): a rotated, stretched bowl plus a ripple, so descents
    # expand, contract and shrink; random dimensions, starts and budgets.
    rng = np.random.default_rng(seed)
    d = int(rng.integers(2, 7))
    rotation, _ = np.linalg.qr(rng.normal(size=(d, d)))
    scales, centre = rng.uniform(0.5, 20.0, d), rng.uniform(-0.2, 1.2, d)

    def f(x):
        z = rotation @ (x - centre)
        return float((scales * z**2).sum() + 0.05 * np.sin(7.0 * x).sum())

    start, budget = rng.uniform(0, 1, d), int(rng.integers(20, 400))
    x_ref, f_ref, runs_ref = _reference_descent(f, start, f(start), budget)
    state = new_descent(d)
    pending, runs = begin_descent(start, f(start), budget, *state), 0
    while pending:
        values = np.array([f(p) for p in state[2][:pending]])
        runs += pending
        pending = tell_descent(values, *state)
    np.testing.assert_allclose(state[0][0], x_ref, rtol=0, atol=1e-12)
    assert state[1][0] == pytest.approx(f_ref, abs=1e-12)
    assert runs == runs_ref
