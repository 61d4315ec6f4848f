"""Tests of regional.repeatcoverage: coverage of the daily bounds at basins held out of the
whole fit, the repeats' summaries, and the widening of flow classes that fall short."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from regional.repeatcoverage import (
    MAX_CLASS_LEVEL,
    WIDEN_TOLERANCE,
    HeldOutRepeat,
    held_out_coverage,
    summarise_repeat,
    widened_levels,
)


def _synthetic_repeats(n_basins=30, days=730, held_noise=0.3, seed=0):
    """Training basins with log errors N(0, 0.3); held-out basins with log errors N(0, held)."""
    rng = np.random.default_rng(seed)
    index = pd.date_range("2001-01-01", periods=days)
    ids = [f"S{i:02d}" for i in range(n_basins)]
    sim = pd.DataFrame(rng.gamma(2.0, 1.0, (days, n_basins)), index=index, columns=ids)
    noise = np.full(n_basins, 0.3)
    noise[:3] = held_noise
    obs = sim * np.exp(rng.normal(0.0, 1.0, (days, n_basins)) * noise)
    repeat = HeldOutRepeat(
        held_out=tuple(ids[:3]),
        training_flow=sim[ids[3:]],
        held_out_flow=sim[ids[:3]],
        n_simulated=n_basins,
        n_reused=0,
    )
    return obs, [repeat]


def test_held_out_coverage_near_nominal_when_basins_are_alike():
    # Exchangeable basins (same lognormal error): bounds built on the others hold about the
    # nominal share of a held-out basin's days (split-conformal, Lei et al. 2018).
    obs, repeats = _synthetic_repeats(held_noise=0.3)
    table = held_out_coverage(obs, repeats, level=0.9, n_classes=5)
    assert list(table.index) == [
        "all",
        *(f"class {c}" for c in range(1, 6)),
        "decile 1",
        "decile 10",
    ]
    assert table.loc["all", "coverage"] == pytest.approx(0.9, abs=0.03)
    assert (table["n_pairs"] == 3).all()


def test_noisier_held_out_basins_fall_short_and_widening_restores_them():
    obs, repeats = _synthetic_repeats(held_noise=0.6)
    table = held_out_coverage(obs, repeats, level=0.9, n_classes=5)
    # log errors twice as wide: the 90 % bounds hold P(|Z| < 1.645 / 2) = 0.59 of the days
    assert table.loc["all", "coverage"] == pytest.approx(
        2 * stats.norm.cdf(1.645 / 2) - 1, abs=0.05
    )
    levels = widened_levels(table.loc[[f"class {c}" for c in range(1, 6)], "coverage"], level=0.9)
    assert (levels > 0.9).all() and (levels <= MAX_CLASS_LEVEL).all()
    widened = held_out_coverage(obs, repeats, level=0.9, n_classes=5, class_levels=levels)
    assert (widened["coverage"] > table["coverage"]).all()


def test_widened_levels_rule():
    # short by 0.06 (> WIDEN_TOLERANCE): raised by the shortfall; short by 0.02: kept; no
    # measurement: kept; short by 0.4: capped at MAX_CLASS_LEVEL
    levels = widened_levels([0.90, 0.88, 0.84, np.nan, 0.5], level=0.9)
    np.testing.assert_allclose(levels, [0.9, 0.9, 0.96, 0.9, MAX_CLASS_LEVEL])
    assert 0.02 <= WIDEN_TOLERANCE < 0.06


def test_summaries_give_the_coverage_of_the_whole_repeats():
    # The held-out check keeps a summary of each repeat (tails of its error model, the held-out
    # flows), not the training basins' flows; coverage from summaries equals coverage from the
    # whole repeats, at the nominal level and widened.
    obs, repeats = _synthetic_repeats(held_noise=0.6)
    summaries = [summarise_repeat(obs, r, level=0.9, n_classes=5) for r in repeats]
    for levels in (None, [0.9, 0.93, 0.96, 0.99, MAX_CLASS_LEVEL]):
        whole = held_out_coverage(obs, repeats, level=0.9, n_classes=5, class_levels=levels)
        kept = held_out_coverage(obs, summaries, level=0.9, n_classes=5, class_levels=levels)
        pd.testing.assert_frame_equal(kept, whole)
    assert not hasattr(summaries[0], "training_flow")
