"""Small seeded gauged regions shared by the transfer tests (invented basins)."""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
import pandas as pd
import pytest


def _make_region(n: int = 24, *, seed: int = 7) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Attributes and a k_per_day that depends on aridity and slope, with noise."""
    rng = np.random.default_rng(seed)
    ids = [f"basin_{i:03d}" for i in range(n)]
    X = pd.DataFrame(
        {
            "aridity": rng.uniform(0.4, 2.5, n),
            "area_km2": rng.lognormal(4.0, 1.0, n),
            "slope_pct": rng.uniform(1.0, 25.0, n),
            "forest_frac": rng.uniform(0.0, 0.9, n),
            "centroid_lon": rng.uniform(6.0, 10.0, n),
            "centroid_lat": rng.uniform(45.5, 47.8, n),
        },
        index=pd.Index(ids, name="basin_id"),
    )
    log_k = -2.3 - 0.6 * (X["aridity"] - 1.0) + 0.03 * X["slope_pct"] + rng.normal(0, 0.15, n)
    y = pd.DataFrame({"k_per_day": np.exp(log_k)}, index=X.index)
    return X, y


@pytest.fixture
def make_region() -> Callable[..., tuple[pd.DataFrame, pd.DataFrame]]:
    """Factory: make_region(n=24, seed=7) -> (attributes X, parameters y)."""
    return _make_region


@pytest.fixture
def region() -> tuple[pd.DataFrame, pd.DataFrame]:
    """24 gauged basins: (attributes X, parameters y with k_per_day)."""
    return _make_region()
