"""Tests of regional.region: load_region and describe_region."""

from __future__ import annotations

import warnings
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from shapely.geometry import Point
from tiny_region import BASIN_IDS, UNGAUGED_IDS, checksums, write_region

from regional.errors import InputError, InputWarning
from regional.region import Region, describe_region, flow_m3s_to_mm, load_region

REAL = Path("/work/shared/data/real")


@pytest.fixture
def region(region_folder) -> Region:
    return load_region(region_folder)


def test_tables_on_common_daily_dates_in_basin_order(region, region_parts):
    assert list(region.basins.index) == list(BASIN_IDS)
    assert region.dates.equals(pd.date_range("2001-01-01", "2003-12-31", freq="D", name="date"))
    for table in (region.precip_mm, region.pet_mm, region.temp_c, region.flow_mm):
        assert table.shape == (1095, 6)
        assert list(table.columns) == list(BASIN_IDS)
        assert table.index.equals(region.dates)
    # second route: pick the same values straight from the long table (held as float32, the
    # nearest float32 to each value of the file)
    series = region_parts.series
    picked = series[series["basin_id"] == "B03"].set_index("date")["precip_mm"].to_numpy()
    np.testing.assert_array_equal(region.precip_mm["B03"].to_numpy(), picked.astype(np.float32))
    assert not region.precip_mm.isna().any().any()


def test_gauged_and_ungauged(region):
    assert region.gauged == ("B01", "B02", "B03", "B04")
    assert region.ungauged == UNGAUGED_IDS
    assert region.flow_mm[list(UNGAUGED_IDS)].isna().all().all()
    assert region.is_point is False
    assert region.basins.crs.to_epsg() == 32633
    assert region.warnings == ()


def test_attributes_from_the_attribute_module(region):
    table = region.attributes
    assert list(table.index) == list(BASIN_IDS)
    assert {"area_km2", "aridity", "sand_frac", "awc_mm", "forest_pct"} <= set(table.columns)
    # B01 lies wholly in the western soil polygon (sand_frac 0.2), B06 in the eastern (0.6)
    assert table.loc["B01", "sand_frac"] == pytest.approx(0.2)
    assert table.loc["B06", "sand_frac"] == pytest.approx(0.6)


def test_one_m3s_over_86_4_km2_is_one_mm_per_day():
    # definition of the units: 1 m3/s * 86 400 s/day / 86.4e6 m2 = 1e-3 m/day = 1 mm/day
    flow = pd.DataFrame({"x": [1.0, 2.0]})
    converted = flow_m3s_to_mm(flow, pd.Series({"x": 86.4}))
    np.testing.assert_allclose(converted["x"], [1.0, 2.0])


def test_points_with_area_and_flow_in_m3s(tmp_path, region_parts):
    basins = region_parts.basins.to_crs(4326)
    basins["geometry"] = [Point(g.centroid.x, g.centroid.y) for g in basins.geometry]
    basins["drainage_km2"] = [86.4, 43.2, 172.8, 100.0, 50.0, 60.0]
    region_parts.basins = basins
    region_parts.config.pop("overlays")
    region_parts.config["basins"]["area"] = "drainage_km2"
    region_parts.config["transfer"]["attributes"] = ["area_km2", "aridity"]
    series = region_parts.config["series"]
    series["flow_m3s"] = series.pop("flow")
    region = load_region(write_region(tmp_path / "r", region_parts))
    assert region.is_point is True
    given = region_parts.series[region_parts.series["basin_id"] == "B03"]["flow_mm"].to_numpy()
    np.testing.assert_allclose(region.flow_mm["B03"].to_numpy(), given * 86.4 / 172.8)
    np.testing.assert_allclose(
        region.flow_mm["B01"].to_numpy(), region_parts.series["flow_mm"][:1095]
    )
    assert region.attributes.loc["B03", "area_km2"] == 172.8
    assert any("points" in note for note in region.notes)


def test_polygons_flow_in_m3s_use_the_computed_area(tmp_path, region_parts):
    series = region_parts.config["series"]
    series["flow_m3s"] = series.pop("flow")
    region = load_region(write_region(tmp_path / "r", region_parts))
    area = region.attributes["area_km2"]
    given = region_parts.series[region_parts.series["basin_id"] == "B02"]["flow_mm"].to_numpy()
    # held as float32: about 7 significant digits
    np.testing.assert_allclose(
        region.flow_mm["B02"].to_numpy(), given * 86.4 / area["B02"], rtol=1e-6
    )
    assert area["B02"] == pytest.approx(100.0, rel=0.01)  # a 10 km x 10 km UTM square


def test_longer_records_are_trimmed_with_a_note(tmp_path, region_parts):
    series = region_parts.series
    extra = series[(series["basin_id"] == "B01") & (series["date"] <= "2001-01-10")].copy()
    extra["date"] = pd.to_datetime(extra["date"]) - pd.Timedelta(days=10)
    extra["date"] = extra["date"].dt.strftime("%Y-%m-%d")
    region_parts.series = pd.concat([extra, series], ignore_index=True)
    region = load_region(write_region(tmp_path / "r", region_parts))
    assert region.dates[0] == pd.Timestamp("2001-01-01")
    assert any("forcing of 1 basins trimmed" in note for note in region.notes)


def test_parquet_series_gives_the_same_region(tmp_path, region_parts, region):
    region_parts.series_name = "series.parquet"
    region_parts.config["series"]["path"] = "series.parquet"
    other = load_region(write_region(tmp_path / "r", region_parts))
    pd.testing.assert_frame_equal(other.precip_mm, region.precip_mm)
    pd.testing.assert_frame_equal(other.flow_mm, region.flow_mm)
    assert other.gauged == region.gauged


def test_warnings_kept_and_re_emitted(tmp_path, region_parts):
    series = region_parts.series
    series.loc[(series["basin_id"] == "B01") & (series["date"] == "2001-06-01"), "flow_mm"] = (
        np.nan
    )
    folder = write_region(tmp_path / "r", region_parts)
    with pytest.warns(InputWarning, match=r"1 of 4 basins with observed flow, 1 missing days"):
        region = load_region(folder)
    assert len(region.warnings) == 1 and "'B01' (1 days)" in region.warnings[0]


def test_calibration_outside_the_record(tmp_path, region_parts):
    region_parts.config["model"]["calibration"] = ["2000-01-01", "2002-12-31"]
    folder = write_region(tmp_path / "r", region_parts)
    with pytest.raises(InputError, match=r"\[model\] calibration.*common forcing 2001-01-01"):
        load_region(folder)


def test_screening_candidates_must_be_ungauged(tmp_path, region_parts):
    region_parts.config["screening"] = {"candidates": ["B05", "B01"]}
    folder = write_region(tmp_path / "r", region_parts)
    with pytest.raises(InputError, match=r"'candidates'.*already gauged \['B01'\]"):
        load_region(folder)
    region_parts.config["screening"] = {"candidates": ["B5"]}
    folder = write_region(tmp_path / "r2", region_parts)
    with pytest.raises(InputError, match=r"'candidates'.*unknown basin ids \['B5'\]"):
        load_region(folder)


def test_describe_region(region):
    summary = describe_region(region)
    assert (summary.n_basins, summary.n_gauged, summary.n_ungauged) == (6, 4, 2)
    assert summary.geometry == "polygons"
    assert summary.records.loc["B01", "flow_days"] == 1095
    assert summary.records.loc["B01", "calibration_days"] == 365
    assert summary.records.loc["B05", "status"] == "ungauged"
    assert pd.isna(summary.records.loc["B05", "first_flow"])
    ranges = summary.attribute_ranges
    assert ranges.loc["area_km2", "min"] == region.attributes["area_km2"].min()
    assert ranges.loc["runoff_ratio", "missing"] == 2
    assert region.summary().records.equals(summary.records)


def test_inputs_are_not_modified(region_folder):
    before = checksums(region_folder)
    load_region(region_folder)
    assert checksums(region_folder) == before


@pytest.mark.skipif(not (REAL / "timeseries.csv.gz").exists(), reason="real dataset not present")
def test_real_dataset_loads(tmp_path):
    # Caravan CAMELS-US subset (see /work/shared/data/real/README.md): 289 gauge points with
    # area_km2, 1981-2014 daily series; read in place, never copied.
    (tmp_path / "region.toml").write_text(
        f"""
[basins]
path = "{REAL / "basins.gpkg"}"
layer = "basins"
id = "basin_id"
[series]
path = "{REAL / "timeseries.csv.gz"}"
id = "basin_id"
date = "date"
precip = "precip_mm"
pet = "pet_mm"
temp = "temp_c"
flow = "flow_mm"
[model]
calibration = ["1982-01-01", "2004-12-31"]
validation = ["2005-01-01", "2014-12-31"]
"""
    )
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", InputWarning)  # gaps in observed flow are expected
        region = load_region(tmp_path)
    assert region.is_point is True
    assert region.precip_mm.shape == (12418, 289)  # README: 12,418 days per basin
    assert len(region.gauged) == 289
    assert region.basins.index[0] == "01022500"  # leading zero kept
    # README: 2.16 % of basin-days of flow missing
    assert region.flow_mm.isna().to_numpy().mean() == pytest.approx(0.0216, abs=0.0005)
