"""Nested and overlapping basins found by shared area."""

import geopandas as gpd
import pytest
from shapely.geometry import Point, box

from regional.overlap import excluded_donors, overlap_shares


def _basins():
    # Squares in degrees near the equator: B nested in A (a quarter of A), C overlaps A by a
    # thin strip, D apart.
    return gpd.GeoDataFrame(
        geometry=[
            box(0, 0, 0.2, 0.2),
            box(0, 0, 0.1, 0.1),
            box(0.19, 0, 0.39, 0.2),
            box(1, 1, 1.1, 1.1),
        ],
        index=["A", "B", "C", "D"],
        crs="EPSG:4326",
    )


def test_nested_basin_shares_all_of_the_smaller_area():
    shares = overlap_shares(_basins()).set_index(["basin_a", "basin_b"])["share"]
    assert shares[("A", "B")] == pytest.approx(1.0, rel=1e-6)
    assert shares[("A", "C")] == pytest.approx(0.05, rel=1e-3)  # 0.01 of a 0.2-wide square
    assert ("A", "D") not in shares.index


def test_only_pairs_above_threshold_are_excluded_both_ways():
    excluded = excluded_donors(overlap_shares(_basins()), 0.5)
    assert excluded == {"A": frozenset({"B"}), "B": frozenset({"A"})}


def test_points_share_no_area():
    points = gpd.GeoDataFrame(
        geometry=[Point(0, 0), Point(0, 0)], index=["p", "q"], crs="EPSG:4326"
    )
    assert overlap_shares(points).empty
