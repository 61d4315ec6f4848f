"""Tests for regional.attributes: geometry, climate indices, overlays and terrain."""

from __future__ import annotations

import warnings

import geopandas as gpd
import numpy as np
import pandas as pd
import pyproj
import pytest
import shapely
from affine import Affine

from regional import io
from regional.attributes import UNEP_REFERENCE, Attributes, aridity_class, compute_attributes
from regional.errors import InputError, InputWarning

UTM = "EPSG:32633"
GEOD = pyproj.Geod(ellps="WGS84")


def _basins(geoms, crs=UTM, ids=None, **columns) -> gpd.GeoDataFrame:
    ids = ids or [f"B{i}" for i in range(len(geoms))]
    return gpd.GeoDataFrame(columns, geometry=list(geoms), crs=crs, index=pd.Index(ids))


def _series(ids, n_days=4, value=1.0) -> pd.DataFrame:
    dates = pd.date_range("2001-01-01", periods=n_days, freq="D")
    return pd.DataFrame(value, index=dates, columns=list(ids))


def _compute(basins, **kwargs) -> Attributes:
    kwargs.setdefault("precip_mm", _series(basins.index, value=2.0))
    kwargs.setdefault("pet_mm", _series(basins.index, value=1.0))
    return compute_attributes(basins, **kwargs)


def _tilted_plane_dem(gx: float, gy: float, *, n_rows=40, n_cols=50, cell_m=100.0) -> io.Raster:
    """z = 500 + gx * east + gy * north (m), on a north-up grid in UTM with 100 m cells."""
    x0, y0 = 500_000.0, 6_050_000.0
    transform = Affine(cell_m, 0.0, x0, 0.0, -cell_m, y0)
    cols, rows = np.meshgrid(np.arange(n_cols) + 0.5, np.arange(n_rows) + 0.5)
    east, north = cols * cell_m, -rows * cell_m
    values = (500.0 + gx * east + gy * north).astype("float64")
    return io.Raster(values=values, transform=transform, crs=pyproj.CRS(UTM), path="plane.tif")


# ----------------------------------------------------------------------------- area and shape


@pytest.mark.parametrize("south", [0.0, 60.0])
def test_area_and_perimeter_match_geodesic_reference(south):
    cell = shapely.box(10.0, south, 11.0, south + 1.0)
    # reference library: pyproj.Geod(ellps="WGS84").geometry_area_perimeter
    ref_area_m2, ref_perimeter_m = GEOD.geometry_area_perimeter(shapely.orient_polygons(cell))
    table = _compute(_basins([cell], crs="EPSG:4326")).table
    assert table.loc["B0", "area_km2"] == pytest.approx(abs(ref_area_m2) / 1e6, rel=1e-3)
    assert table.loc["B0", "perimeter_km"] == pytest.approx(ref_perimeter_m / 1e3, rel=1e-3)


@pytest.mark.parametrize("south", [0.0, 60.0])
def test_area_independent_of_the_input_crs(south):
    # same cell, densified along its edges and given in a projected CRS (EPSG:3857, not
    # equal-area): the computed area must still match the geodesic reference within 0.1 %
    cell = shapely.box(10.0, south, 11.0, south + 1.0)
    ref_area_m2, _ = GEOD.geometry_area_perimeter(
        shapely.orient_polygons(cell)
    )  # reference: pyproj
    dense = gpd.GeoSeries([shapely.segmentize(cell, 0.01)], crs="EPSG:4326").to_crs("EPSG:3857")
    table = _compute(_basins(dense, crs="EPSG:3857")).table
    assert table.loc["B0", "area_km2"] == pytest.approx(abs(ref_area_m2) / 1e6, rel=1e-3)


def test_area_subtracts_holes():
    outer = shapely.box(500_000, 6_050_000, 510_000, 6_060_000)
    hole = shapely.box(502_000, 6_052_000, 504_000, 6_054_000)
    ring = shapely.Polygon(outer.exterior.coords, [hole.exterior.coords])
    table = _compute(_basins([outer, ring])).table
    # definition: the ring's area is the outer square's minus the hole's (4 km2 of 100 km2)
    assert table.loc["B0", "area_km2"] - table.loc["B1", "area_km2"] == pytest.approx(
        4.0 * table.loc["B0", "area_km2"] / 100.0, rel=1e-4
    )


def test_gravelius_of_circle_is_one_and_of_square_known():
    circle = shapely.Point(500_000, 6_050_000).buffer(3_000, quad_segs=256)
    square = shapely.box(520_000, 6_050_000, 526_000, 6_056_000)
    table = _compute(_basins([circle, square])).table
    # definition (Gravelius 1914): Kc = P / (2 sqrt(pi A)) = 1 for a circle
    assert table.loc["B0", "compactness"] == pytest.approx(1.0, abs=1e-3)
    # definition: a square of side s has P = 4 s, A = s^2, so Kc = 4 / (2 sqrt(pi))
    assert table.loc["B1", "compactness"] == pytest.approx(4.0 / (2.0 * np.sqrt(np.pi)), rel=1e-4)


def test_centroid_in_degrees():
    cell = shapely.box(10.0, 0.0, 11.0, 1.0)
    table = _compute(_basins([cell], crs="EPSG:4326")).table
    # geometry: a one-degree cell at the equator is symmetric about (10.5, ~0.5)
    assert table.loc["B0", "centroid_lon"] == pytest.approx(10.5, abs=1e-9)
    assert table.loc["B0", "centroid_lat"] == pytest.approx(0.5, abs=1e-3)


# ----------------------------------------------------------------------------- climate


@pytest.mark.parametrize(
    ("p_over_pet", "expected"),
    [
        (0.0, "hyper-arid"),
        (0.0499, "hyper-arid"),
        (0.05, "arid"),
        (0.1999, "arid"),
        (0.2, "semi-arid"),
        (0.4999, "semi-arid"),
        (0.5, "dry sub-humid"),
        (0.6499, "dry sub-humid"),
        (0.65, "humid"),
        (2.5, "humid"),
    ],
)
def test_unep_aridity_classes_at_thresholds(p_over_pet, expected):
    # source: UNEP (1992) World Atlas of Desertification, classes on P/PET
    assert aridity_class(p_over_pet) == expected


@pytest.mark.parametrize(
    ("precip", "pet", "expected"),
    [
        (1.0, 20.0, "arid"),
        (1.0, 5.0, "semi-arid"),
        (1.0, 2.0, "dry sub-humid"),
        (13.0, 20.0, "humid"),
    ],
)
def test_aridity_class_through_compute_at_thresholds(precip, pet, expected):
    # source: UNEP (1992) World Atlas of Desertification; P/PET exactly on each lower bound
    basins = _basins([shapely.box(0, 0, 1000, 1000)])
    result = _compute(
        basins, precip_mm=_series(["B0"], value=precip), pet_mm=_series(["B0"], value=pet)
    )
    assert result.table.loc["B0", "aridity"] == pytest.approx(pet / precip)
    assert result.table.loc["B0", "aridity_class"] == expected
    assert any(UNEP_REFERENCE in note for note in result.notes)


def test_aridity_class_nan_gives_none():
    assert aridity_class(np.array([np.nan, 0.7]))[0] is None


def test_aridity_runoff_ratio_and_snow_fraction_by_hand():
    basins = _basins([shapely.box(0, 0, 1000, 1000), shapely.box(2000, 0, 3000, 1000)])
    dates = pd.date_range("2001-01-01", periods=4, freq="D")
    precip = pd.DataFrame({"B0": [2.0, 4.0, 6.0, 8.0], "B1": [1.0, 1.0, 1.0, 1.0]}, index=dates)
    pet = pd.DataFrame({"B0": [1.0, 1.0, 3.0, 5.0], "B1": [2.0, 2.0, 2.0, 2.0]}, index=dates)
    temp = pd.DataFrame({"B0": [-1.0, 1.0, -2.0, 3.0], "B1": [5.0, 5.0, 5.0, 5.0]}, index=dates)
    flow = pd.DataFrame({"B0": [1.0, np.nan, 3.0, np.nan], "B1": np.nan}, index=dates)
    table = compute_attributes(
        basins, precip_mm=precip, pet_mm=pet, temp_c=temp, flow_mm=flow
    ).table
    # by hand: mean PET 2.5 / mean P 5 = 0.5
    assert table.loc["B0", "aridity"] == pytest.approx(0.5)
    # by hand: flow on days 1 and 3 only: mean Q 2 / mean P (2 + 6) / 2 = 0.5
    assert table.loc["B0", "runoff_ratio"] == pytest.approx(0.5)
    assert np.isnan(table.loc["B1", "runoff_ratio"])
    # by hand: P on days below 0 degC is 2 + 6 = 8 of 20
    assert table.loc["B0", "snow_fraction"] == pytest.approx(0.4)
    assert table.loc["B1", "snow_fraction"] == 0.0


def test_skipped_inputs_are_noted_and_columns_absent():
    result = _compute(_basins([shapely.box(0, 0, 1000, 1000)]))
    assert {"snow_fraction", "runoff_ratio", "elevation_mean", "slope_mean"}.isdisjoint(
        result.table.columns
    )
    joined = " | ".join(result.notes)
    assert "snow_fraction skipped" in joined
    assert "runoff_ratio skipped" in joined
    assert "no raster given" in joined


def test_series_without_a_basin_column_is_an_error():
    basins = _basins([shapely.box(0, 0, 1000, 1000), shapely.box(2000, 0, 3000, 1000)])
    with pytest.raises(InputError, match=r"series pet_mm: no values for 1 basin.*'B1'"):
        compute_attributes(basins, precip_mm=_series(basins.index), pet_mm=_series(["B0"]))


# ----------------------------------------------------------------------------- overlays


def _soils(geoms, crs=UTM, **fields) -> io.Overlay:
    frame = gpd.GeoDataFrame(fields, geometry=list(geoms), crs=crs)
    return io.Overlay(frame=frame, fields=tuple(fields), source="soils.gpkg:soils")


def test_overlay_weights_exact_on_squares():
    basin = shapely.box(500_000, 6_050_000, 502_000, 6_052_000)  # 2 km x 2 km
    soils = _soils(
        [
            shapely.box(499_000, 6_049_000, 500_500, 6_053_000),  # covers the west quarter
            shapely.box(500_500, 6_049_000, 503_000, 6_053_000),  # covers the east 3/4
        ],
        sand_frac=[0.1, 0.7],
        awc_mm=[200.0, 100.0],
    )
    table = _compute(_basins([basin]), overlays=[soils]).table
    # by hand: weights 1/4 and 3/4 of the basin's area (rel 1e-6: moving the corners from UTM to
    # the equal-area CRS bends the squares' edges by less than 1e-7 of their length)
    assert table.loc["B0", "sand_frac"] == pytest.approx(0.25 * 0.1 + 0.75 * 0.7, rel=1e-6)
    assert table.loc["B0", "awc_mm"] == pytest.approx(0.25 * 200.0 + 0.75 * 100.0, rel=1e-6)


def test_overlay_partial_cover_uses_covered_part_and_notes_share():
    basin = shapely.box(500_000, 6_050_000, 502_000, 6_052_000)
    soils = _soils(
        [
            shapely.box(500_000, 6_050_000, 500_400, 6_052_000),  # 20 % of the basin
            shapely.box(500_400, 6_050_000, 501_200, 6_052_000),  # 40 %; the east 40 % uncovered
        ],
        sand_frac=[0.3, 0.6],
    )
    result = _compute(_basins([basin]), overlays=[soils])
    # by hand: mean over the covered 60 %: (0.2 * 0.3 + 0.4 * 0.6) / 0.6
    assert result.table.loc["B0", "sand_frac"] == pytest.approx((0.06 + 0.24) / 0.6, rel=1e-6)
    assert any("not fully covered" in n and "B0 (60.0%)" in n for n in result.notes)


def test_overlay_blank_field_value_excluded_from_weights():
    basin = shapely.box(500_000, 6_050_000, 502_000, 6_052_000)
    soils = _soils(
        [
            shapely.box(500_000, 6_050_000, 501_000, 6_052_000),
            shapely.box(501_000, 6_050_000, 502_000, 6_052_000),
        ],
        awc_mm=[np.nan, 150.0],
    )
    result = _compute(_basins([basin]), overlays=[soils])
    assert result.table.loc["B0", "awc_mm"] == pytest.approx(150.0)
    assert any("B0 (50.0%)" in note for note in result.notes)


def test_overlay_in_another_crs_and_basin_outside_gets_nan():
    inside = shapely.box(500_000, 6_050_000, 501_000, 6_051_000)
    far = shapely.box(600_000, 6_050_000, 601_000, 6_051_000)
    cover = gpd.GeoSeries([shapely.box(499_000, 6_049_000, 502_000, 6_052_000)], crs=UTM)
    soils = _soils(cover.to_crs("EPSG:4326"), crs="EPSG:4326", sand_frac=[0.4])
    table = _compute(_basins([inside, far]), overlays=[soils]).table
    assert table.loc["B0", "sand_frac"] == pytest.approx(0.4)
    assert np.isnan(table.loc["B1", "sand_frac"])


def test_overlapping_overlay_polygons_warn():
    basin = shapely.box(500_000, 6_050_000, 502_000, 6_052_000)
    soils = _soils([shapely.box(499_000, 6_049_000, 503_000, 6_053_000)] * 2, sand_frac=[0.2, 0.4])
    with pytest.warns(InputWarning, match=r"polygons overlap inside 1 basin"):
        _compute(_basins([basin]), overlays=[soils])


def test_overlay_missing_or_text_field_is_an_error():
    basin = _basins([shapely.box(500_000, 6_050_000, 502_000, 6_052_000)])
    cover = [shapely.box(499_000, 6_049_000, 503_000, 6_053_000)]
    with pytest.raises(InputError, match=r"soils.gpkg:soils: field 'clay' not found"):
        _compute(
            basin,
            overlays=[
                io.Overlay(_soils(cover, sand_frac=[0.2]).frame, ("clay",), "soils.gpkg:soils")
            ],
        )
    with pytest.raises(InputError, match=r"field 'texture' must be numeric.*'loam'"):
        _compute(basin, overlays=[_soils(cover, texture=["loam"])])


# ----------------------------------------------------------------------------- terrain


def test_slope_of_tilted_plane_equals_its_gradient():
    gx, gy = 0.03, -0.04  # m/m east and north, |grad| = 0.05
    dem = _tilted_plane_dem(gx, gy)
    basin = shapely.box(501_000, 6_046_500, 503_000, 6_048_500)
    table = _compute(_basins([basin]), dem=dem).table
    # geometry of a plane: slope angle = arctan(|grad z|)
    assert table.loc["B0", "slope_mean"] == pytest.approx(np.degrees(np.arctan(0.05)), rel=1e-9)
    # a plane's mean over a square of cells equals its value at the square's centre
    centre = 500.0 + gx * 2_000.0 + gy * (-2_500.0)
    assert table.loc["B0", "elevation_mean"] == pytest.approx(centre, rel=1e-9)


def test_slope_of_plane_on_geographic_grid_at_60_degrees():
    # z rises 0.02 m per metre eastward; metres along each row measured with pyproj.Geod
    # (reference library) so the plane is exact in local metres at every row's latitude
    n_rows, n_cols, cell = 30, 30, 0.001
    lon0, lat_top = 10.0, 60.015
    lats = lat_top - cell * (np.arange(n_rows) + 0.5)
    lons = lon0 + cell * (np.arange(n_cols) + 0.5)
    east_m = np.array(
        [
            GEOD.inv(np.full(n_cols, lon0), np.full(n_cols, lat), lons, np.full(n_cols, lat))[2]
            for lat in lats
        ]
    )
    dem = io.Raster(
        values=100.0 + 0.02 * east_m,
        transform=Affine(cell, 0.0, lon0, 0.0, -cell, lat_top),
        crs=pyproj.CRS("EPSG:4326"),
        path="geo.tif",
    )
    basin = shapely.box(lon0 + 0.005, lat_top - 0.025, lon0 + 0.025, lat_top - 0.005)
    table = _compute(_basins([basin], crs="EPSG:4326"), dem=dem).table
    # geometry of a plane: slope angle = arctan(0.02); tolerance for the finite-difference of the
    # slightly curved parallel
    assert table.loc["B0", "slope_mean"] == pytest.approx(np.degrees(np.arctan(0.02)), rel=1e-4)


def test_cells_counted_by_centre_and_small_basin_takes_its_cell():
    values = np.arange(20.0).reshape(4, 5)
    dem = io.Raster(
        values, Affine(100.0, 0, 500_000.0, 0, -100.0, 6_050_000.0), pyproj.CRS(UTM), "g.tif"
    )
    # covers the centres of cells (row 0, cols 0-1) only: x 0..160 m, y top 0..90 m
    wide = shapely.box(500_000, 6_049_910, 500_160, 6_050_000)
    tiny = shapely.box(500_310, 6_049_710, 500_330, 6_049_730)  # inside cell (row 2, col 3)
    result = _compute(_basins([wide, tiny]), dem=dem)
    assert result.table.loc["B0", "elevation_mean"] == pytest.approx(0.5)  # mean of 0 and 1
    assert result.table.loc["B1", "elevation_mean"] == pytest.approx(13.0)
    assert any("smaller than a DEM cell" in note and "'B1'" in note for note in result.notes)


def test_basin_outside_dem_warns_and_is_nan():
    dem = _tilted_plane_dem(0.01, 0.0)
    far = shapely.box(700_000, 6_000_000, 701_000, 6_001_000)
    with pytest.warns(InputWarning, match=r"1 basin\(s\) lie outside the DEM"):
        table = _compute(_basins([far]), dem=dem).table
    assert np.isnan(table.loc["B0", "slope_mean"])


def test_dem_nodata_cells_are_skipped():
    dem = _tilted_plane_dem(0.0, 0.0)
    values = dem.values.copy()
    values[:, :25] = np.nan
    dem = io.Raster(values, dem.transform, dem.crs, dem.path)
    basin = shapely.box(500_000, 6_047_000, 505_000, 6_050_000)
    table = _compute(_basins([basin]), dem=dem).table
    assert table.loc["B0", "elevation_mean"] == pytest.approx(500.0)
    assert table.loc["B0", "slope_mean"] == pytest.approx(0.0)


def test_rotated_dem_is_an_error():
    dem = _tilted_plane_dem(0.0, 0.0)
    rotated = io.Raster(
        dem.values, Affine(100.0, 5.0, 500_000.0, 5.0, -100.0, 6_050_000.0), dem.crs, "rot.tif"
    )
    with pytest.raises(InputError, match=r"raster rot.tif: the grid is rotated"):
        _compute(_basins([shapely.box(501_000, 6_047_000, 502_000, 6_048_000)]), dem=rotated)


# ---------------------------------------------------------------------------- points, user columns


def test_points_take_area_from_column_and_skip_polygon_attributes():
    points = [shapely.Point(500_000, 6_050_000), shapely.Point(510_000, 6_060_000)]
    basins = _basins(points, area_km2=[120.0, 45.5])
    soils = _soils([shapely.box(400_000, 6_000_000, 600_000, 6_100_000)], sand_frac=[0.3])
    result = _compute(basins, overlays=[soils], dem=_tilted_plane_dem(0.01, 0.0))
    table = result.table
    assert table["area_km2"].tolist() == [120.0, 45.5]
    assert {"perimeter_km", "compactness", "sand_frac", "elevation_mean", "slope_mean"}.isdisjoint(
        table.columns
    )
    assert any("basins are points" in note for note in result.notes)
    # reference library: pyproj Transformer for the point's own longitude and latitude
    lon, lat = pyproj.Transformer.from_crs(UTM, "EPSG:4326", always_xy=True).transform(
        500_000, 6_050_000
    )
    assert table.loc["B0", "centroid_lon"] == pytest.approx(lon)
    assert table.loc["B0", "centroid_lat"] == pytest.approx(lat)


def test_points_without_area_column_are_an_error():
    basins = _basins([shapely.Point(500_000, 6_050_000)])
    with pytest.raises(InputError, match=r"basins are points .* no area_km2 column"):
        _compute(basins)


def test_user_columns_pass_through_unchanged():
    geoms = [shapely.box(0, 0, 1000, 1000), shapely.box(2000, 0, 4000, 1000)]
    basins = _basins(geoms, name=["Upper", "Lower"], area_km2=[9.0, 99.0], aridity=[np.nan, 3.0])
    before = basins.copy()
    result = _compute(basins)
    table = result.table
    pd.testing.assert_frame_equal(
        table[["name", "area_km2", "aridity"]],
        pd.DataFrame(before.drop(columns="geometry")).rename_axis("basin_id"),
    )
    assert list(table.columns[:3]) == ["name", "area_km2", "aridity"]
    assert "perimeter_km" in table.columns  # other attributes still computed
    assert any("not computed: area_km2, aridity" in note for note in result.notes)
    pd.testing.assert_frame_equal(basins, before)  # input not modified


# ----------------------------------------------------------------------------- bad basins


def test_basins_without_crs_are_an_error():
    basins = gpd.GeoDataFrame(geometry=[shapely.box(0, 0, 1, 1)], index=pd.Index(["B0"]))
    with pytest.raises(InputError, match=r"basins: the layer has no CRS"):
        _compute(basins)


def test_mixed_points_and_polygons_are_an_error():
    basins = _basins(
        [shapely.box(0, 0, 1000, 1000), shapely.Point(5000, 5000)], area_km2=[1.0, 2.0]
    )
    with pytest.raises(InputError, match=r"mixes 1 polygon and 1 point basins \(points: 'B1'\)"):
        _compute(basins)


def test_invalid_and_empty_polygons_are_errors():
    bowtie = shapely.Polygon([(0, 0), (1000, 1000), (1000, 0), (0, 1000)])
    with pytest.raises(InputError, match=r"basin 'B0' has an invalid polygon \(Self-intersection"):
        _compute(_basins([bowtie]))
    with pytest.raises(InputError, match=r"basin 'B1' has an empty or missing geometry"):
        _compute(_basins([shapely.box(0, 0, 1, 1), shapely.Polygon()]))


def test_no_warning_on_clean_inputs():
    basin = shapely.box(501_000, 6_046_500, 503_000, 6_048_500)
    soils = _soils([shapely.box(499_000, 6_040_000, 506_000, 6_051_000)], sand_frac=[0.5])
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        _compute(_basins([basin]), overlays=[soils], dem=_tilted_plane_dem(0.01, 0.02))


def test_coverage_notes_grouped_by_field_shares():
    basin = shapely.box(500_000, 6_050_000, 502_000, 6_052_000)
    soils = _soils(
        [
            shapely.box(500_000, 6_050_000, 501_000, 6_052_000),
            shapely.box(501_000, 6_050_000, 501_500, 6_052_000),
        ],
        sand_frac=[0.2, 0.4],  # covers 75 %
        awc_mm=[120.0, 80.0],  # same 75 %
        clay_frac=[0.1, np.nan],  # only the first polygon: 50 %
    )
    notes = _compute(_basins([basin]), overlays=[soils]).notes
    assert any("field(s) sand_frac, awc_mm: 1 basin(s)" in n and "B0 (75.0%)" in n for n in notes)
    assert any("field(s) clay_frac: 1 basin(s)" in n and "B0 (50.0%)" in n for n in notes)


def test_same_field_in_two_overlays_is_an_error():
    basin = _basins([shapely.box(500_000, 6_050_000, 502_000, 6_052_000)])
    cover = [shapely.box(499_000, 6_049_000, 503_000, 6_053_000)]
    first = _soils(cover, sand_frac=[0.2])
    second = io.Overlay(first.frame, ("sand_frac",), "geology.gpkg:units")
    with pytest.raises(InputError, match=r"field 'sand_frac' is listed by both soils.gpkg:soils"):
        _compute(basin, overlays=[first, second])


def test_column_sums_a_block_of_basins_at_a_time_are_the_whole_arrays_sums():
    # two routes: each basin's float32 series widened and summed a block of basins at a time,
    # and the whole (days, basins) array widened at once and summed per basin: the same bits
    from regional.attributes import _column_sums

    rng = np.random.default_rng(7)
    values = rng.gamma(0.6, 5.0, (3653, 11)).astype(np.float32)
    whole = np.ascontiguousarray(np.asarray(values, dtype=float).T).sum(axis=1)
    for block in (1, 3, 11, 256):
        np.testing.assert_array_equal(_column_sums(values, block=block), whole)
