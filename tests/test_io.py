"""Tests of regional.io readers and the atomic CSV writer."""

from __future__ import annotations

import geopandas as gpd
import numpy as np
import pandas as pd
import pytest
import rasterio
from affine import Affine
from shapely.geometry import Point, box

from regional import io
from regional.errors import InputError


@pytest.fixture
def gpkg(tmp_path, region_parts):
    path = tmp_path / "layers.gpkg"
    region_parts.basins.to_file(path, layer="basins", driver="GPKG")
    region_parts.soils.to_file(path, layer="soils", driver="GPKG")
    return path


# ----------------------------------------------------------------------------- basins


def test_read_basins_indexed_by_text_id_with_crs(gpkg, region_parts):
    basins = io.read_basins(gpkg, "basins", id_field="basin_id")
    assert basins.index.name == "basin_id"
    assert list(basins.index) == list(region_parts.basins["basin_id"])
    assert basins.crs == region_parts.basins.crs
    assert "basin_id" not in basins.columns
    assert basins["forest_pct"].tolist() == region_parts.basins["forest_pct"].tolist()


def test_integer_ids_become_text(tmp_path):
    path = tmp_path / "points.gpkg"
    frame = gpd.GeoDataFrame(
        {"gauge": [7, 12], "area": [10.0, 20.0]},
        geometry=[Point(10, 50), Point(11, 51)],
        crs="EPSG:4326",
    )
    frame.to_file(path, layer="gauges")
    basins = io.read_basins(path, id_field="gauge", area_field="area")
    assert list(basins.index) == ["7", "12"]
    assert basins["area_km2"].tolist() == [10.0, 20.0]  # renamed from 'area'


def test_area_field_conflicting_with_area_km2_column(tmp_path):
    path = tmp_path / "points.gpkg"
    frame = gpd.GeoDataFrame(
        {"id": ["a"], "area": [1.0], "area_km2": [2.0]}, geometry=[Point(0, 0)], crs=4326
    )
    frame.to_file(path)
    with pytest.raises(InputError, match=r"both a column 'area_km2' and the area column 'area'"):
        io.read_basins(path, id_field="id", area_field="area")


def test_missing_area_field_lists_columns(gpkg):
    with pytest.raises(InputError, match=r"column 'area_sqkm' \(set by \[basins\] area\)"):
        io.read_basins(gpkg, "basins", id_field="basin_id", area_field="area_sqkm")


def test_missing_file_names_it_and_suggests(tmp_path, gpkg):
    with pytest.raises(InputError, match=r"basins file not found: .*layer\.gpkg.*'layers.gpkg'"):
        io.read_basins(tmp_path / "layer.gpkg", "basins", id_field="basin_id")


def test_missing_layer_lists_available(gpkg):
    with pytest.raises(InputError, match=r"layer 'basin' not found.*'basins', 'soils'"):
        io.read_basins(gpkg, "basin", id_field="basin_id")


def test_several_layers_need_a_name(gpkg):
    with pytest.raises(InputError, match=r"holds 2 layers \('basins', 'soils'\)"):
        io.read_basins(gpkg, id_field="basin_id")


def test_missing_id_field_lists_available(gpkg):
    with pytest.raises(InputError, match=r"column 'id' \(set by \[basins\] id\).*'forest_pct'"):
        io.read_basins(gpkg, "basins", id_field="id")


def test_not_a_vector_file(tmp_path):
    path = tmp_path / "notes.gpkg"
    path.write_text("not a geopackage")
    with pytest.raises(InputError, match=r"cannot read .*notes.gpkg as a vector file"):
        io.read_basins(path, id_field="id")


# ----------------------------------------------------------------------------- overlays


def test_read_overlay(gpkg):
    overlay = io.read_overlay(gpkg, "soils", fields=["sand_frac"])
    assert overlay.fields == ("sand_frac",)
    assert list(overlay.frame.columns) == ["sand_frac", "geometry"]
    assert overlay.source.endswith("layers.gpkg:soils")


def test_overlay_field_missing_or_not_numeric(tmp_path, gpkg):
    with pytest.raises(InputError, match=r"column 'sand' \(set by fields\).*'sand_frac'\?"):
        io.read_overlay(gpkg, "soils", fields=["sand"])
    path = tmp_path / "text.gpkg"
    gpd.GeoDataFrame({"texture": ["loam"]}, geometry=[box(0, 0, 1, 1)], crs=3035).to_file(path)
    with pytest.raises(InputError, match=r"overlay field 'texture' .* must be numeric"):
        io.read_overlay(path, fields=["texture"])


# ----------------------------------------------------------------------------- raster


def write_dem(path, values, *, crs="EPSG:32633", nodata=-9999.0):
    transform = Affine(100.0, 0.0, 400_000.0, 0.0, -100.0, 5_020_000.0)
    with rasterio.open(
        path,
        "w",
        driver="GTiff",
        height=values.shape[0],
        width=values.shape[1],
        count=1,
        dtype="float32",
        crs=crs,
        transform=transform,
        nodata=nodata,
    ) as dataset:
        dataset.write(values.astype("float32"), 1)
    return transform


def test_read_raster_nodata_is_nan(tmp_path):
    values = np.arange(12.0).reshape(3, 4)
    values[1, 2] = -9999.0
    transform = write_dem(tmp_path / "dem.tif", values)
    raster = io.read_raster(tmp_path / "dem.tif")
    assert np.isnan(raster.values[1, 2])
    assert np.nansum(raster.values) == sum(range(12)) - 6  # cell value 6 replaced by nodata
    assert raster.transform == transform
    assert raster.crs.to_epsg() == 32633


def test_read_raster_without_crs_keeps_none(tmp_path):
    write_dem(tmp_path / "dem.tif", np.ones((2, 2)), crs=None)
    assert io.read_raster(tmp_path / "dem.tif").crs is None


def test_read_raster_missing_or_unreadable(tmp_path):
    with pytest.raises(InputError, match=r"raster file not found: .*dem.tif"):
        io.read_raster(tmp_path / "dem.tif")
    (tmp_path / "dem.tif").write_text("text")
    with pytest.raises(InputError, match=r"cannot read .*dem.tif as a raster"):
        io.read_raster(tmp_path / "dem.tif")


# ----------------------------------------------------------------------------- series

COLUMNS = {"id_column": "basin_id", "date_column": "date", "value_columns": ["precip_mm"]}


def test_csv_index_is_the_line_in_the_file(tmp_path):
    path = tmp_path / "s.csv"
    path.write_text("basin_id,date,precip_mm,extra\n007,2001-01-01,1.5,x\n\n8,2001-01-02,2,y\n")
    frame = io.read_series(path, **COLUMNS)
    assert frame.index.name == "line"
    assert list(frame.index) == [2, 4]  # the blank line 3 is dropped, numbering kept
    lines = path.read_text().splitlines()
    assert lines[frame.index[1] - 1].startswith("8,")  # second route to the same line
    assert frame["basin_id"].tolist() == ["007", "8"]  # ids kept as text
    assert frame["precip_mm"].dtype == np.float64
    assert list(frame.columns) == ["basin_id", "date", "precip_mm"]


def test_csv_gz_and_non_numeric_kept_as_text(tmp_path):
    path = tmp_path / "s.csv.gz"
    pd.DataFrame({"basin_id": ["01"], "date": ["2001-01-01"], "precip_mm": ["abc"]}).to_csv(
        path, index=False
    )
    frame = io.read_series(path, **COLUMNS)
    assert frame["precip_mm"].tolist() == ["abc"]
    assert frame["basin_id"].tolist() == ["01"]


def test_parquet_rows_are_one_based(tmp_path):
    path = tmp_path / "s.parquet"
    pd.DataFrame(
        {"basin_id": [1, 2], "date": ["2001-01-01"] * 2, "precip_mm": [1.0, 2.0]}
    ).to_parquet(path)
    frame = io.read_series(path, **COLUMNS)
    assert frame.index.name == "row" and list(frame.index) == [1, 2]
    assert frame["basin_id"].tolist() == ["1", "2"]


def test_geopackage_table(tmp_path):
    path = tmp_path / "s.gpkg"
    table = pd.DataFrame({"basin_id": ["a", "b"], "date": ["2001-01-01"] * 2, "precip_mm": [1, 2]})
    gpd.GeoDataFrame(table, geometry=[None, None], crs=4326).to_file(path, layer="daily")
    frame = io.read_series(path, layer="daily", **COLUMNS)
    assert frame["basin_id"].tolist() == ["a", "b"]
    assert frame["precip_mm"].tolist() == [1.0, 2.0]
    with pytest.raises(InputError, match=r"layer 'dialy' not found.*'daily'"):
        io.read_series(path, layer="dialy", **COLUMNS)


def test_series_missing_column_lists_available(tmp_path):
    path = tmp_path / "s.csv"
    path.write_text("basin_id,day,precip_mm\n")
    with pytest.raises(
        InputError, match=r"column 'date' \(set by \[series\]\) not found in .*s.csv"
    ):
        io.read_series(path, **COLUMNS)


def test_semicolon_file_gets_a_hint(tmp_path):
    path = tmp_path / "s.csv"
    path.write_text("basin_id;date;precip_mm\na;2001-01-01;1\n")
    with pytest.raises(InputError, match=r"seems to use ';'"):
        io.read_series(path, **COLUMNS)


def test_series_missing_file(tmp_path):
    with pytest.raises(InputError, match=r"series file not found: .*nothing.csv"):
        io.read_series(tmp_path / "nothing.csv", **COLUMNS)


# ----------------------------------------------------------------------------- writer


def test_write_csv_replaces_atomically(tmp_path):
    path = tmp_path / "out.csv"
    path.write_text("old\n")
    frame = pd.DataFrame({"x": [1.5]}, index=pd.Index(["007"], name="basin_id"))
    io.write_csv(frame, path)
    assert path.read_text().splitlines() == ["basin_id,x", "007,1.5"]
    assert [p.name for p in tmp_path.iterdir()] == ["out.csv"]  # no temporary left behind


def test_write_csv_failure_keeps_previous_file(tmp_path):
    path = tmp_path / "out.csv"
    path.write_text("old\n")

    class Broken(pd.DataFrame):
        def to_csv(self, *args, **kwargs):
            raise RuntimeError("disk full")

    with pytest.raises(RuntimeError, match="disk full"):
        io.write_csv(Broken({"x": [1]}), path)
    assert path.read_text() == "old\n"
    assert [p.name for p in tmp_path.iterdir()] == ["out.csv"]


def test_write_csv_missing_folder(tmp_path):
    with pytest.raises(InputError, match=r"the folder .*nowhere does not exist"):
        io.write_csv(pd.DataFrame(), tmp_path / "nowhere" / "out.csv")
