"""The searches of regional.search on functions whose minimum is known."""

import numpy as np
import pytest

from regional.search import evolve_and_polish, screen_and_descend

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
