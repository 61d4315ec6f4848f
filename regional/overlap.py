"""Which gauged basins share area with each other (nested or overlapping catchments).

In leave-one-out, a donor that is nested in the target, or contains it, carries much of the
target's own observed flow; such donors are excluded when the shared area exceeds a set share of
the smaller basin (``[transfer] exclude_overlap``, default 0.5).
"""

from __future__ import annotations

import geopandas as gpd
import numpy as np
import pandas as pd

EQUAL_AREA_CRS = "EPSG:6933"
"""WGS 84 / NSIDC EASE-Grid 2.0 Global, a cylindrical equal-area projection."""


def overlap_shares(basins: gpd.GeoDataFrame) -> pd.DataFrame:
    """Shared area of every intersecting pair as a share of the smaller basin.

    Parameters
    ----------
    basins : GeoDataFrame
        Polygons indexed by basin_id with a CRS. Points (or other non-areal geometry) share no
        area.

    Returns
    -------
    DataFrame
        Columns ``basin_a``, ``basin_b`` (each pair once, a < b in index order), ``share``
        (0..1): intersection area / min(area_a, area_b).
    """
    areal = basins[basins.geometry.geom_type.isin(["Polygon", "MultiPolygon"])]
    if areal.empty:
        return pd.DataFrame({"basin_a": [], "basin_b": [], "share": []})
    projected = areal.geometry.to_crs(EQUAL_AREA_CRS).reset_index(drop=True)
    left, right = projected.sindex.query(projected, predicate="intersects")
    keep = left < right
    left, right = left[keep], right[keep]
    shared = projected.iloc[left].intersection(projected.iloc[right], align=False).area
    smaller = np.minimum(projected.area.to_numpy()[left], projected.area.to_numpy()[right])
    ids = areal.index.astype(str).to_numpy()
    return pd.DataFrame(
        {"basin_a": ids[left], "basin_b": ids[right], "share": shared.to_numpy() / smaller}
    )


def excluded_donors(shares: pd.DataFrame, threshold: float) -> dict[str, frozenset[str]]:
    """For each basin, the basins sharing more than ``threshold`` of the smaller area with it."""
    pairs = shares[shares["share"] > threshold]
    excluded: dict[str, set[str]] = {}
    for a, b in zip(pairs["basin_a"], pairs["basin_b"], strict=True):
        excluded.setdefault(a, set()).add(b)
        excluded.setdefault(b, set()).add(a)
    return {basin: frozenset(others) for basin, others in excluded.items()}
