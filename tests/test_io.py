"""Tests of regional.io readers and the atomic CSV writer."""

from __future__ import annotations

import errno
import os
import stat

import geopandas as gpd
import numpy as np
import pandas as pd
import pytest
import rasterio
from affine import Affine
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp
from shapely.geometry import Point, box

from regional import io
from regional.errors import InputError, RunError


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


# ----------------------------------------------------------------------------- results folders


def _write(folder, tag: str) -> None:
    """One small results folder whose every file carries ``tag``."""
    table = pd.DataFrame({"tag": [tag] * 3})
    io.write_run_folder(
        folder,
        tables={"a.csv": table, "b.csv": table},
        layers={},
        crs="EPSG:4326",
        figures={"f": tag.encode()},
        report=f"<p>{tag}</p>",
        manifest={"regional": "test", "tag": tag},
    )


def test_run_folder_tables_are_the_bytes_pandas_writes(tmp_path):
    # two routes to one file: the results folder's CSV writer (float64 columns formatted by
    # Python's repr) and pandas' own to_csv, on values whose text is easy to get wrong
    rng = np.random.default_rng(11)
    tricky = [np.nan, np.inf, -np.inf, -0.0, 0.0, 1e-7, 1e-4, 1.5e17, 1e16, 0.1 + 0.2, 5e-324]
    floats = np.concatenate([tricky, rng.lognormal(0.0, 3.0, 200), -rng.random(50)])
    n = len(floats)
    table = pd.DataFrame(
        {
            "basin_id": [f"b,{i}" if i % 7 == 0 else f"b{i}" for i in range(n)],
            "date": pd.date_range("2001-01-01", periods=n, freq="D"),
            "flow_mm": floats,
            "flow_f32": floats.astype(np.float32),
            "count": np.arange(n),
            "flag": np.arange(n) % 3 == 0,
            "level": 0.9,
        }
    )
    indexed = table.set_index("basin_id")
    parts = io.TableParts(
        lambda: iter([table.iloc[:100], table.iloc[100:].reset_index(drop=True)])
    )
    io.write_run_folder(
        tmp_path / "results",
        tables={"whole.csv": table, "indexed.csv": indexed, "parts.csv": parts},
        layers={},
        crs="EPSG:4326",
        figures={},
        report=None,
        manifest={"regional": "test"},
    )
    folder = tmp_path / "results"
    assert (folder / "whole.csv").read_text() == table.to_csv(index=False)
    assert (folder / "indexed.csv").read_text() == indexed.to_csv()
    assert (folder / "parts.csv").read_text() == table.to_csv(index=False)
    assert table["flow_mm"].dtype == np.float64  # the table given is not changed


def test_tables_and_layers_given_as_calls_are_built_in_turn(tmp_path):
    # each call is made when its file is written: a table's call finds the tables before it
    # already on disk (the folder holds one table at a time), and the files are those of the
    # tables given whole
    import shapely

    staging = []

    def built(name: str, content):
        def build():
            staging.append((name, sorted(p.name for p in tmp_path.glob("*.tmp*/*"))))
            return content

        return build

    table = pd.DataFrame({"basin_id": ["a", "b"], "k_per_day": [0.1, 0.25]})
    layer = gpd.GeoDataFrame(table, geometry=[shapely.Point(0, 0), shapely.Point(1, 1)])
    io.write_run_folder(
        tmp_path / "lazy",
        tables={"a.csv": built("a.csv", table), "b.csv": built("b.csv", table)},
        layers={"gauged": built("gauged", layer)},
        crs="EPSG:4326",
        figures={},
        report=None,
        manifest={"regional": "test"},
    )
    assert staging == [("a.csv", []), ("b.csv", ["a.csv"]), ("gauged", ["a.csv", "b.csv"])]
    io.write_run_folder(
        tmp_path / "whole",
        tables={"a.csv": table, "b.csv": table},
        layers={"gauged": layer},
        crs="EPSG:4326",
        figures={},
        report=None,
        manifest={"regional": "test"},
    )
    for name in ("a.csv", "b.csv"):
        assert (tmp_path / "lazy" / name).read_bytes() == (tmp_path / "whole" / name).read_bytes()
    lazy = gpd.read_file(tmp_path / "lazy" / io.RESULTS_GPKG, layer="gauged")
    whole = gpd.read_file(tmp_path / "whole" / io.RESULTS_GPKG, layer="gauged")
    pd.testing.assert_frame_equal(lazy, whole)


def test_parquet_files_written_a_row_group_per_part_read_back_whole(tmp_path):
    # two routes to one file: a further file given as one part is the bytes pandas writes
    # (to_parquet); given as three parts it holds three row groups and reads back as the
    # table, in a new results folder and in a stage update of one
    import pyarrow.parquet

    days = pd.date_range("2001-01-01", periods=10, freq="D", name="date")
    columns = pd.Index(["a", "b"], name="basin_id")
    table = pd.DataFrame(np.linspace(0.0, 1.0, 20, dtype="float32").reshape(10, 2), days, columns)
    one = io.TableParts(lambda: iter([table]))
    three = io.TableParts(lambda: iter([table.iloc[:4], table.iloc[4:8], table.iloc[8:]]))
    files = {
        "fitted/whole.parquet": table,
        "fitted/one.parquet": one,
        "fitted/three.parquet": three,
    }
    folder = tmp_path / "results"
    empty = {"tables": {}, "layers": {}, "crs": "EPSG:4326", "figures": {}}
    io.write_run_folder(folder, **empty, report=None, manifest={"regional": "t"}, files=files)
    # a stage update replaces the sub-folder as a whole: every file named again
    io.update_run_folder(folder, **empty, files=files | {"fitted/again.parquet": three})
    fitted = folder / "fitted"
    assert (fitted / "one.parquet").read_bytes() == (fitted / "whole.parquet").read_bytes()
    for name in ("three", "again"):
        assert pyarrow.parquet.ParquetFile(fitted / f"{name}.parquet").num_row_groups == 3
        back = pd.read_parquet(fitted / f"{name}.parquet")
        pd.testing.assert_frame_equal(back, table, check_freq=False)


def test_tables_written_a_few_rows_at_a_time_are_the_same_bytes():
    # the CSV writer turns rows into text a block at a time: blocks of 1, 3 and all rows, of a
    # whole table, of an indexed one and of parts, give the bytes pandas writes at once
    import io as stdio

    rng = np.random.default_rng(3)
    n = 40
    table = pd.DataFrame(
        {
            "basin_id": [f"b{i // 7}" for i in range(n)],
            "date": pd.date_range("2001-01-01", periods=n, freq="D"),
            "flow_mm": np.where(np.arange(n) % 9 == 0, np.nan, rng.lognormal(0.0, 3.0, n)),
            "count": np.arange(n),
            "level": 0.9,  # columns of one value are turned into text once
            "zero": -0.0,
            "missing": np.nan,
        }
    )
    indexed = table.set_index("basin_id")
    parts = io.TableParts(lambda: iter([table.iloc[:13], table.iloc[13:].reset_index(drop=True)]))
    expected = {"whole": table.to_csv(index=False), "indexed": indexed.to_csv()}
    expected["parts"] = expected["whole"]
    for rows in (1, 3, n, 10 * n):
        for name, content in (("whole", table), ("indexed", indexed), ("parts", parts)):
            stream = stdio.StringIO()
            io._table_to_csv(content, stream, rows_at_a_time=rows)
            assert stream.getvalue() == expected[name], (name, rows)
    stream = stdio.StringIO()
    io._table_to_csv(table.iloc[:0], stream, rows_at_a_time=3)
    assert stream.getvalue() == table.iloc[:0].to_csv(index=False)  # the header alone


@pytest.mark.parametrize(
    "column",
    [
        ["a,b", "c", "d"],  # text to quote
        ['say "x"', "c", "d"],
        ["line\nbreak", "c", "d"],
        ["", "c", "d"],  # empty text
        [None, "c", "d"],  # missing text
        pd.array(["a", None, "c"], dtype="string"),
        pd.to_datetime(
            ["2001-01-01 06:00", "2001-01-02 00:00", "2001-01-03 00:00"]
        ),  # a time of day
        pd.to_datetime(["2001-01-01", None, "2001-01-03"]),  # a missing date
        [True, False, True],
        pd.array([1, None, 3], dtype="Int64"),
        np.array([1.5, np.inf, -np.inf], dtype=np.float32),
        np.array([-0.0, np.inf, -np.inf]),
        np.array([7, 8, 9], dtype=np.uint16),
    ],
    ids=repr,
)
def test_tables_of_any_column_are_written_as_pandas_writes_them(column):
    # the writer joins the text of plain columns itself and leaves the others to pandas:
    # either way the bytes are those pandas' to_csv writes for each block of rows
    import io as stdio

    table = pd.DataFrame(
        {"basin_id": ["b1", "b2", "b3"], "column": column, "flow_mm": [0.5, np.nan, 2.0]}
    )
    for rows in (1, 2, 3):
        stream = stdio.StringIO()
        io._table_to_csv(table, stream, rows_at_a_time=rows)
        blocks = range(0, len(table), rows)
        expected = "".join(
            table.iloc[i : i + rows].to_csv(index=False, header=i == 0) for i in blocks
        )
        assert stream.getvalue() == expected, rows


@settings(max_examples=60, deadline=None)
@given(
    values=hnp.arrays(np.float64, st.integers(1, 40), elements=st.floats(allow_subnormal=True)),
    scale=st.sampled_from([1.0, 1e-6, 1e-4, 1e6, 1e10, 1e16]),
)
def test_floats_of_every_magnitude_are_written_as_pandas_writes_them(values, scale):
    # Arrow turns most floats into text, repr the zeros, tiny and huge values, NaN and the
    # infinities: the bytes stay those of pandas' to_csv (reference: pandas), with Arrow's
    # cast and without it
    import io as stdio

    with np.errstate(over="ignore", invalid="ignore"):
        scaled = values * scale
    table = pd.DataFrame({"flow_mm": values, "scaled": scaled, "day": np.arange(len(values))})
    expected = table.to_csv(index=False)
    for arrow in (True, False):
        stream = stdio.StringIO()
        with pytest.MonkeyPatch.context() as patch:
            patch.setattr(io, "_arrow_writes_repr", lambda arrow=arrow: arrow)
            io._table_to_csv(table, stream, rows_at_a_time=7)
        assert stream.getvalue() == expected


def _dead_pid() -> int:
    import subprocess
    import sys

    child = subprocess.Popen([sys.executable, "-c", "pass"])
    child.wait()
    return child.pid


def test_manifest_marks_ownership_with_tool_and_format(tmp_path):
    _write(tmp_path / "results", "one")
    manifest = io.read_manifest(tmp_path / "results")
    assert (manifest["tool"], manifest["format"], manifest["tag"]) == ("regional", 1, "one")
    assert io.is_results_folder(tmp_path / "results")


@pytest.mark.parametrize(
    ("content", "ours"),
    [
        ('{"regional": "0.1.0", "region": "x"}', True),  # written before the format field
        ('{"tool": "regional", "format": 1}', True),
        ('{"tool": "other", "format": 1}', False),
        ('{"regional": "0.1.0", "format": "one"}', False),
        ('["regional"]', False),
        ("not json", False),
    ],
)
def test_earlier_results_recognised_by_their_manifest(tmp_path, content, ours):
    (tmp_path / "run.json").write_text(content)
    assert io.is_results_folder(tmp_path) is ours


def test_a_folder_of_other_files_is_never_replaced(tmp_path):
    own = tmp_path / "own"
    own.mkdir()
    (own / "run.json").write_text('{"tool": "someone else"}')
    with pytest.raises(InputError, match="not a results folder of this tool"):
        _write(own, "one")
    assert [p.name for p in own.iterdir()] == ["run.json"]
    assert [p.name for p in tmp_path.iterdir()] == ["own"]


def test_stale_temporaries_of_dead_writers_are_removed_and_live_ones_kept(tmp_path):
    dead, alive = _dead_pid(), os.getpid()
    stale = [
        tmp_path / f".results.{dead}.abc_12.tmp",
        tmp_path / f".results.{dead}.xyz.old",
        tmp_path / f".results.previous-{dead}",
    ]
    live = tmp_path / f".results.{alive}.def.tmp"
    unrelated = [tmp_path / ".results.notapid.tmp", tmp_path / f".other.{dead}.abc.tmp"]
    for folder in [*stale, live, *unrelated]:
        folder.mkdir()
        (folder / "x.csv").write_text("x")
    _write(tmp_path / "results", "one")
    names = {p.name for p in tmp_path.iterdir()}
    assert not names & {p.name for p in stale}
    assert {live.name, *(p.name for p in unrelated), "results"} <= names


def test_stale_temporary_files_inside_a_results_folder_are_removed(tmp_path):
    results = tmp_path / "results"
    _write(results, "one")
    stale = results / f".a.csv.{_dead_pid()}.q1w2.tmp"
    stale.write_text("half")
    io.update_run_folder(
        results, tables={"a.csv": pd.DataFrame({"x": [1]})}, layers={}, crs=None, figures={}
    )
    assert not stale.exists()


def test_racing_writers_leave_one_whole_folder(tmp_path):
    # Four threads write 15 folders each into one name; none may raise, and the folder left
    # must be one writer's whole output (every file carries the same tag).
    from concurrent.futures import ThreadPoolExecutor

    target = tmp_path / "results"
    tags = [f"w{writer}-{n}" for n in range(15) for writer in range(4)]
    with ThreadPoolExecutor(max_workers=4) as pool:
        list(pool.map(lambda tag: _write(target, tag), tags))
    tag = io.read_manifest(target)["tag"]
    assert set(pd.read_csv(target / "a.csv")["tag"]) == {tag}
    assert set(pd.read_csv(target / "b.csv")["tag"]) == {tag}
    assert (target / "figures" / "f.png").read_bytes() == tag.encode()
    assert (target / "report.html").read_text() == f"<p>{tag}</p>"
    assert [p.name for p in tmp_path.iterdir()] == ["results"]


def test_racing_processes_leave_one_whole_folder(tmp_path):
    # As above with three processes (each cleans up after dead writers only, never a live one).
    import multiprocessing
    from concurrent.futures import ProcessPoolExecutor

    target = tmp_path / "results"
    tags = [f"p{writer}-{n}" for n in range(8) for writer in range(3)]
    context = multiprocessing.get_context("fork")
    with ProcessPoolExecutor(max_workers=3, mp_context=context) as pool:
        list(pool.map(_write, [target] * len(tags), tags))
    tag = io.read_manifest(target)["tag"]
    assert set(pd.read_csv(target / "a.csv")["tag"]) == {tag}
    assert (target / "figures" / "f.png").read_bytes() == tag.encode()
    assert [p.name for p in tmp_path.iterdir()] == ["results"]


def test_stage_update_needs_an_earlier_results_folder(tmp_path):
    (tmp_path / "mine").mkdir()
    with pytest.raises(InputError, match="no earlier results"):
        io.update_run_folder(tmp_path / "mine", tables={}, layers={}, crs=None, figures={})


def test_write_csv_follows_the_umask(tmp_path):
    previous = os.umask(0o022)
    try:
        path = io.write_csv(pd.DataFrame({"x": [1]}), tmp_path / "a.csv")
    finally:
        os.umask(previous)
    assert stat.S_IMODE(path.stat().st_mode) == 0o644


def test_write_csv_disk_full_is_a_run_error_and_leaves_nothing(tmp_path, monkeypatch):
    path = tmp_path / "out.csv"
    path.write_text("old\n")

    class Full(pd.DataFrame):
        def to_csv(self, *args, **kwargs):
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    with pytest.raises(RunError, match="No space left on device.*free disk space"):
        io.write_csv(Full({"x": [1]}), path)
    assert path.read_text() == "old\n"
    assert [p.name for p in tmp_path.iterdir()] == ["out.csv"]


def test_figures_written_as_they_come_and_read_back_for_the_report(tmp_path):
    # figures given as (name, bytes) pairs are written one by one; the report call gets them
    # as a mapping that reads each file when asked for, and its pieces are written in order
    drawn = []

    def images():
        for name in ("b", "a"):
            drawn.append(name)
            yield name, f"png {name}".encode()

    seen = {}

    def report(figures):
        seen.update(names=list(figures), a=figures["a"], drawn=list(drawn))
        return iter(["<p>", figures["b"].decode(), "</p>"])

    folder = io.write_run_folder(
        tmp_path / "results",
        tables={},
        layers={},
        crs="EPSG:4326",
        figures=images,
        report=report,
        manifest={"regional": "test"},
    )
    assert (folder / "figures" / "a.png").read_bytes() == b"png a"
    assert seen == {"names": ["b", "a"], "a": b"png a", "drawn": ["b", "a"]}
    assert (folder / "report.html").read_text() == "<p>png b</p>"


def test_store_blocks_are_whole_row_groups_of_at_most_the_batch_rows():
    # Counted by hand: groups of 3, 3, 3, 10 and 1 rows in batches of 6 rows.
    from regional.io import _group_runs

    runs = list(_group_runs(np.array([3, 3, 3, 10, 1]), 6))
    assert runs == [range(0, 2), range(2, 3), range(3, 4), range(4, 5)]
    assert list(_group_runs(np.array([], dtype=int), 6)) == []
