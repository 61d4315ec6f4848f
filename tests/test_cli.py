"""Tests of the command line: `regional check` and `regional attributes`, bad input -> exit 2.

Every bad-input test breaks one thing in the tiny region and asserts exit code 2, no traceback,
and a message naming the file, layer or column and the basin or row (line) at fault.
"""

from __future__ import annotations

import gc
import re
import subprocess
import sys
import weakref

import numpy as np
import pandas as pd
import pytest
from shapely.geometry import Point, Polygon
from tiny_region import checksums, write_region

from regional import __version__, cli
from regional.cli import main


def run(capsys, *args):
    code = main([str(arg) for arg in args])
    out, err = capsys.readouterr()
    return code, out, err


def check_fails(capsys, folder, *patterns):
    """`regional check folder` exits 2 with one error message containing every pattern."""
    code, out, err = run(capsys, "check", folder)
    MESSAGES.append(err)
    assert code == 2
    assert "Traceback" not in err
    assert err.startswith("error: ")
    assert err.count("error: ") == 1
    for pattern in patterns:
        assert pattern in err, f"{pattern!r} not in {err!r}"
    return err


MESSAGES: list[str] = []


def line_of(path, text):
    """1-based line number of the first line of a file containing ``text`` (header = line 1)."""
    for number, line in enumerate(path.read_text().splitlines(), start=1):
        if text in line:
            return number
    raise AssertionError(f"{text!r} not in {path}")


# ----------------------------------------------------------------------------- program


def test_help_and_version_from_the_installed_entry_point():
    helped = subprocess.run(
        [sys.executable, "-m", "regional.cli", "--help"], capture_output=True, text=True
    )
    assert helped.returncode == 0
    assert "check" in helped.stdout and "attributes" in helped.stdout
    assert "uncertainty" in helped.stdout  # the caution is part of --help
    version = subprocess.run(
        [sys.executable, "-m", "regional.cli", "--version"], capture_output=True, text=True
    )
    assert version.returncode == 0 and version.stdout.strip() == f"regional {__version__}"


def test_subcommand_help(capsys):
    with pytest.raises(SystemExit, match="0"):
        main(["check", "--help"])
    assert "exit code 0 when the region is usable" in " ".join(
        capsys.readouterr().out.lower().split()
    )


def test_bad_input_through_the_real_process_has_no_traceback(tmp_path):
    result = subprocess.run(
        [sys.executable, "-m", "regional.cli", "check", str(tmp_path / "nowhere")],
        capture_output=True,
        text=True,
    )
    assert result.returncode == 2
    assert "Traceback" not in result.stderr
    assert "region settings not found" in result.stderr and "nowhere" in result.stderr


class Node:
    """An object that can sit in a reference cycle and be watched through a weak reference."""

    def __init__(self):
        self.itself = self


def test_libraries_load_with_the_collector_off_and_their_objects_are_set_aside():
    assert gc.isenabled() and gc.get_freeze_count() == 0
    try:
        with cli._loading_libraries():
            assert not gc.isenabled()
            loaded = weakref.ref(Node())  # a cycle made while loading, then dropped
        assert gc.isenabled()
        gc.collect()
        assert loaded() is not None  # set aside: full collections skip it
        later = weakref.ref(Node())  # made afterwards: collected as usual
        gc.collect()
        assert later() is None
    finally:
        gc.unfreeze()
    gc.collect()
    assert loaded() is None


def test_loading_leaves_a_disabled_collector_disabled():
    gc.disable()
    try:
        with cli._loading_libraries():
            pass
        assert not gc.isenabled()
    finally:
        gc.unfreeze()
        gc.enable()


def test_main_gives_the_collector_back_as_it_found_it(capsys, region_folder):
    code, _, err = run(capsys, "check", region_folder)  # imports inside _loading_libraries
    assert code == 0, err
    assert gc.isenabled() and gc.get_freeze_count() == 0


def test_the_program_exits_with_the_code_of_main_and_its_objects_set_aside(monkeypatch):
    monkeypatch.setattr(cli, "main", lambda: 3)
    try:
        with pytest.raises(SystemExit) as stop:
            cli.command_line()
        assert stop.value.code == 3
        assert gc.get_freeze_count() > 0
    finally:
        gc.unfreeze()


# ----------------------------------------------------------------------------- good region


def test_check_prints_summary_and_leaves_inputs_untouched(capsys, region_folder):
    before = checksums(region_folder)
    code, out, err = run(capsys, "check", region_folder)
    assert code == 0, err
    assert "basins: 6 polygons (4 gauged, 2 ungauged)" in out
    assert "forcing: 2001-01-01..2003-12-31 (1095 days" in out
    assert "calibration: 2002-01-01..2002-12-31; validation: 2003-01-01..2003-12-31" in out
    records = out.split("record length per basin")[1].split("attribute ranges")[0]
    assert re.search(r"B01\s+gauged\s+2001-01-01\s+2003-12-31\s+1095\s", records)
    assert re.search(r"B06\s+ungauged\s+-\s+-\s+0\s", records)
    ranges = out.split("attribute ranges:")[1]
    assert "sand_frac" in ranges and "area_km2" in ranges
    assert "warnings: 0" in out and "usable: yes" in out
    assert "warning:" not in err
    assert checksums(region_folder) == before


def test_attributes_writes_csv(capsys, tmp_path, region_folder):
    before = checksums(region_folder)
    target = tmp_path / "attributes.csv"
    code, out, err = run(capsys, "attributes", region_folder, "--out", target)
    assert code == 0, err
    table = pd.read_csv(target, dtype={"basin_id": str}, index_col="basin_id")
    assert list(table.index) == ["B01", "B02", "B03", "B04", "B05", "B06"]
    assert {"area_km2", "aridity", "sand_frac", "awc_mm", "forest_pct"} <= set(table.columns)
    assert f"wrote 6 basins x {table.shape[1]} attributes" in out
    assert sorted(p.name for p in tmp_path.iterdir()) == ["attributes.csv", "region"]
    assert checksums(region_folder) == before


def test_attributes_missing_output_folder(capsys, tmp_path, region_folder):
    code, _, err = run(capsys, "attributes", region_folder, "--out", tmp_path / "no" / "a.csv")
    assert code == 2 and "Traceback" not in err and "does not exist" in err


def test_gap_in_observed_flow_is_a_warning_with_counts(capsys, tmp_path, region_parts):
    series = region_parts.series
    gap = (series["basin_id"] == "B02") & series["date"].between("2002-03-01", "2002-03-10")
    series.loc[gap, "flow_mm"] = np.nan
    folder = write_region(tmp_path / "r", region_parts)
    code, out, err = run(capsys, "check", folder)
    assert code == 0
    assert "warnings: 1 (listed below)" in out
    warning = [line for line in err.splitlines() if line.startswith("warning: ")]
    assert len(warning) == 1
    assert "column 'flow_mm'" in warning[0] and "series.csv" in warning[0]
    assert (
        "1 of 4 basins with observed flow, 10 missing days in all: 'B02' (10 days)" in warning[0]
    )
    row = re.search(r"B02\s+gauged\s+\S+\s+\S+\s+(\d+)\s+\S+\s+(\d+)\s+(\d+)", out)
    assert row.groups() == ("1085", "10", "355")  # flow days, gap days, calibration days


# ----------------------------------------------------------------------------- bad input


def test_missing_file(capsys, tmp_path, region_parts):
    region_parts.config["basins"]["path"] = "regoin.gpkg"
    folder = write_region(tmp_path / "r", region_parts)
    check_fails(
        capsys, folder, "basins file not found", "regoin.gpkg", "did you mean 'region.gpkg'"
    )


def test_missing_layer(capsys, tmp_path, region_parts):
    region_parts.config["basins"]["layer"] = "catchments"
    folder = write_region(tmp_path / "r", region_parts)
    check_fails(capsys, folder, "layer 'catchments' not found", "region.gpkg", "'basins', 'soils'")


def test_missing_id_field(capsys, tmp_path, region_parts):
    region_parts.config["basins"]["id"] = "code"
    folder = write_region(tmp_path / "r", region_parts)
    check_fails(capsys, folder, "column 'code' (set by [basins] id)", "region.gpkg", "'basin_id'")


def test_duplicate_ids(capsys, tmp_path, region_parts):
    region_parts.basins.loc[4, "basin_id"] = "B02"
    folder = write_region(tmp_path / "r", region_parts)
    check_fails(
        capsys,
        folder,
        "region.gpkg (layer 'basins')",
        "each basin id must appear once",
        "'B02' at rows 2, 5",
    )


def test_series_ids_absent_from_basins(capsys, tmp_path, region_parts):
    series = region_parts.series
    extra = series[series["basin_id"] == "B03"].assign(basin_id="B99")
    region_parts.series = pd.concat([series, extra], ignore_index=True)
    folder = write_region(tmp_path / "r", region_parts)
    first = line_of(folder / "series.csv", "B99,")
    check_fails(
        capsys, folder, "series.csv", "column 'basin_id'", f"'B99' (first at line {first})"
    )


def test_basins_absent_from_series(capsys, tmp_path, region_parts):
    series = region_parts.series
    region_parts.series = series[series["basin_id"] != "B04"]
    folder = write_region(tmp_path / "r", region_parts)
    check_fails(
        capsys, folder, "series.csv", "every basin of the basins layer needs daily series", "'B04'"
    )


def test_leading_zero_mismatch_is_explained(capsys, tmp_path, region_parts):
    region_parts.basins["basin_id"] = ["0101", "0102", "0103", "0104", "0105", "0106"]
    ids = {f"B0{i}": str(100 + i) for i in range(1, 7)}
    region_parts.series["basin_id"] = region_parts.series["basin_id"].map(ids)
    folder = write_region(tmp_path / "r", region_parts)
    check_fails(capsys, folder, "'101' (first at line 2)", "differs only by leading zeros")


@pytest.mark.filterwarnings("ignore:'crs' was not provided")  # the test writes a layer without CRS
def test_no_crs(capsys, tmp_path, region_parts):
    region_parts.basins = region_parts.basins.set_crs(None, allow_override=True)
    folder = write_region(tmp_path / "r", region_parts)
    check_fails(
        capsys, folder, "region.gpkg (layer 'basins')", "coordinate reference system", "no CRS"
    )


def test_invalid_geometry(capsys, tmp_path, region_parts):
    x, y = region_parts.basins.geometry.iloc[2].bounds[:2]
    bowtie = Polygon([(x, y), (x + 5000, y + 5000), (x + 5000, y), (x, y + 8000)])
    region_parts.basins.loc[2, "geometry"] = bowtie
    folder = write_region(tmp_path / "r", region_parts)
    check_fails(
        capsys,
        folder,
        "layer 'basins'",
        "polygons must be valid",
        "basin 'B03' (row 3)",
        "Self-intersection",
    )


def test_empty_geometry(capsys, tmp_path, region_parts):
    region_parts.basins.loc[3, "geometry"] = Polygon()
    folder = write_region(tmp_path / "r", region_parts)
    check_fails(
        capsys, folder, "layer 'basins'", "every basin needs a geometry", "basin 'B04' (row 4)"
    )


def test_non_numeric_precipitation(capsys, tmp_path, region_parts):
    series = region_parts.series.astype({"precip_mm": object})
    series.loc[1500, "precip_mm"] = "1,5"
    region_parts.series = series
    folder = write_region(tmp_path / "r", region_parts)
    basin, date = series.loc[1500, ["basin_id", "date"]]
    line = line_of(folder / "series.csv", f"{basin},{date},")
    assert line == 1502  # record 1500 (0-based) sits under the header
    check_fails(
        capsys, folder, "series.csv", "column 'precip_mm'", f"basin '{basin}' (line {line}): '1,5'"
    )


def test_negative_precipitation(capsys, tmp_path, region_parts):
    region_parts.series.loc[40, "precip_mm"] = -3.5
    folder = write_region(tmp_path / "r", region_parts)
    check_fails(
        capsys, folder, "column 'precip_mm'", "must not be negative", "basin 'B01' (line 42): -3.5"
    )


def test_missing_precipitation_value(capsys, tmp_path, region_parts):
    region_parts.series.loc[1200, "pet_mm"] = np.nan
    folder = write_region(tmp_path / "r", region_parts)
    check_fails(
        capsys,
        folder,
        "column 'pet_mm'",
        "must be given on every day",
        "basin 'B02' (line 1202): empty",
    )


def test_unparsable_date(capsys, tmp_path, region_parts):
    region_parts.series.loc[2300, "date"] = "2003-02-30"
    folder = write_region(tmp_path / "r", region_parts)
    check_fails(
        capsys,
        folder,
        "column 'date'",
        "ISO calendar days",
        "basin 'B03' (line 2302): '2003-02-30'",
    )


def test_duplicated_date(capsys, tmp_path, region_parts):
    series = region_parts.series
    series.loc[10, "date"] = series.loc[11, "date"]
    folder = write_region(tmp_path / "r", region_parts)
    date = series.loc[11, "date"]
    check_fails(
        capsys, folder, "column 'date'", "one record per date", f"'B01 on {date}' at lines 12, 13"
    )


def test_missing_days_in_forcing(capsys, tmp_path, region_parts):
    series = region_parts.series
    region_parts.series = series.drop(index=range(1100, 1105))
    folder = write_region(tmp_path / "r", region_parts)
    check_fails(
        capsys,
        folder,
        "column 'date'",
        "every day between",
        "basin 'B02': 5 missing days",
        "line 1102",
    )


def test_zero_area_basin(capsys, tmp_path, region_parts):
    x, y = region_parts.basins.geometry.iloc[1].bounds[:2]
    region_parts.basins.loc[1, "geometry"] = Polygon([(x, y), (x + 10, y), (x + 20, y), (x, y)])
    folder = write_region(tmp_path / "r", region_parts)
    check_fails(capsys, folder, "layer 'basins'", "positive area", "basin 'B02' (row 2)")


def test_zero_area_in_area_column(capsys, tmp_path, region_parts):
    region_parts.basins["area_km2"] = [64.0, 100.0, 0.0, 81.0, 121.0, 196.0]
    folder = write_region(tmp_path / "r", region_parts)
    check_fails(capsys, folder, "column 'area_km2'", "positive area", "basin 'B03' (row 3): 0")


def point_parts(region_parts, *, area):
    basins = region_parts.basins.to_crs(4326)
    basins["geometry"] = [Point(g.centroid.x, g.centroid.y) for g in basins.geometry]
    if area is not None:
        basins["area_km2"] = area
    region_parts.basins = basins
    region_parts.config.pop("overlays")
    return region_parts


def test_flow_in_m3s_without_area(capsys, tmp_path, region_parts):
    parts = point_parts(region_parts, area=None)
    parts.config["series"]["flow_m3s"] = parts.config["series"].pop("flow")
    folder = write_region(tmp_path / "r", parts)
    check_fails(
        capsys,
        folder,
        "region.gpkg (layer 'basins')",
        "flow in m3/s",
        "without an 'area_km2' column",
    )


def test_flow_in_m3s_with_a_blank_area(capsys, tmp_path, region_parts):
    parts = point_parts(region_parts, area=[50.0, 60.0, np.nan, 70.0, 80.0, 90.0])
    parts.config["series"]["flow_m3s"] = parts.config["series"].pop("flow")
    folder = write_region(tmp_path / "r", parts)
    check_fails(capsys, folder, "column 'area_km2'", "flow in m3/s", "basin 'B03' (row 3): empty")


def test_points_without_area(capsys, tmp_path, region_parts):
    folder = write_region(tmp_path / "r", point_parts(region_parts, area=None))
    check_fails(capsys, folder, "layer 'basins'", "basins given as points need their area")


def test_unknown_config_key(capsys, tmp_path, region_parts):
    region_parts.config["transfer"]["donnors"] = 3
    folder = write_region(tmp_path / "r", region_parts)
    check_fails(
        capsys,
        folder,
        "region.toml",
        "unknown key 'donnors' in [transfer]",
        "did you mean 'donors'?",
    )


def test_missing_required_key(capsys, tmp_path, region_parts):
    del region_parts.config["series"]["pet"]
    folder = write_region(tmp_path / "r", region_parts)
    check_fails(capsys, folder, "region.toml", "missing required key 'pet' in [series]")


def test_too_few_gauged(capsys, tmp_path, region_parts):
    series = region_parts.series
    series.loc[series["basin_id"].isin(["B01", "B02"]), "flow_mm"] = np.nan
    folder = write_region(tmp_path / "r", region_parts)
    check_fails(
        capsys,
        folder,
        "column 'flow_mm'",
        "at least 3 basins",
        "2 gauged of 6 basins in 2002-01-01..2002-12-31",
    )


def test_unknown_transfer_attribute(capsys, tmp_path, region_parts):
    region_parts.config["transfer"]["attributes"] = ["area_km2", "sandfrac"]
    folder = write_region(tmp_path / "r", region_parts)
    check_fails(
        capsys,
        folder,
        "[transfer]",
        "'sandfrac' is not an attribute",
        "did you mean 'sand_frac'?",
    )


# ----------------------------------------------------------------------------- user parameters


@pytest.mark.parametrize(
    ("table", "patterns"),
    [
        pytest.param(
            "basin_id,k_per_day\nB01,0.05\nB99,0.07\n",
            ["column 'basin_id'", "basin 'B99' (line 3)", "must be a basin of the basins layer"],
            id="unknown basin",
        ),
        pytest.param(
            "basin_id,k\nB01,0.05\n",
            ["no column 'k_per_day' (model 'linear') among 'basin_id', 'k'"],
            id="missing column",
        ),
        pytest.param(
            "basin_id,k_per_day\nB01,0.05\nB02,-0.1\n",
            ["column 'k_per_day'", "basin 'B02' (line 3): '-0.1'", "bounds 0.001 to 1.5"],
            id="negative value",
        ),
        pytest.param(
            "basin_id,k_per_day\nB01,0.05\nB02,fast\n",
            ["column 'k_per_day'", "basin 'B02' (line 3): 'fast'", "must be numbers"],
            id="non-numeric value",
        ),
        pytest.param(
            "basin_id,k_per_day\nB01,0.05\nB02,\n",
            ["column 'k_per_day'", "basin 'B02' (line 3): empty", "needs a value"],
            id="empty value",
        ),
        pytest.param(
            "basin_id,k_per_day\nB01,0.05\nB01,0.06\n",
            ["column 'basin_id'", "'B01' at lines 2, 3"],
            id="repeated basin",
        ),
    ],
)
def test_bad_parameter_table_names_file_column_basin_and_line(
    capsys, tmp_path, region_parts, table, patterns
):
    region_parts.config["model"]["parameters"] = "constants.csv"
    folder = write_region(tmp_path / "r", region_parts)
    (folder / "constants.csv").write_text(table)
    before = checksums(folder)
    check_fails(capsys, folder, "constants.csv", *patterns)
    assert checksums(folder) == before


def test_parameters_without_flow_need_the_snow_values_held_in_the_config(
    capsys, tmp_path, region_parts
):
    # A basin without observed flow cannot calibrate the snow store's parameters: with the
    # store on and its values not held in [model], its row in the table is refused.
    from tiny_region import SNOW_HELD

    for name in SNOW_HELD:
        del region_parts.config["model"][name]
    region_parts.config["model"]["parameters"] = "constants.csv"
    folder = write_region(tmp_path / "r", region_parts)
    (folder / "constants.csv").write_text("basin_id,k_per_day\nB01,0.05\nB05,0.06\n")
    check_fails(capsys, folder, "constants.csv", "'B05'", "no observed flow", "snow_threshold_c")
