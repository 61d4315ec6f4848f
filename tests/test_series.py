"""Daily series streamed in batches into compact grids: the same tables, the same messages."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from tiny_region import write_region

from regional import series
from regional.errors import InputError
from regional.region import load_region

SMALL_BATCH = 500
"""Rows per batch in these tests: every basin's record (1,095 days) spans several batches."""


@pytest.mark.parametrize("name", ["series.csv", "series.parquet"])
def test_batches_give_the_tables_of_one_batch(tmp_path, region_parts, monkeypatch, name):
    region_parts.series_name = name
    region_parts.config["series"]["path"] = name
    folder = write_region(tmp_path / "r", region_parts)
    whole = load_region(folder)
    monkeypatch.setattr(series, "BATCH_ROWS", SMALL_BATCH)
    batched = load_region(folder)
    for table in ("precip_mm", "pet_mm", "temp_c", "flow_mm"):
        pd.testing.assert_frame_equal(getattr(batched, table), getattr(whole, table))
    pd.testing.assert_frame_equal(batched.attributes, whole.attributes)


def test_tables_are_float32_and_share_one_grid(region_folder):
    region = load_region(region_folder)
    values = region.precip_mm.to_numpy()
    assert values.dtype == np.float32
    # each basin's column is one contiguous run of days in memory (a view, no copy)
    column = region.precip_mm["B02"].to_numpy()
    assert column.flags["C_CONTIGUOUS"]
    assert np.shares_memory(column, values)


def _message(folder) -> str:
    with pytest.raises(InputError) as caught:
        load_region(folder)
    return str(caught.value)


def _rows_shuffled(parts, seed: int = 3):
    """Records in random order, so a basin's rows fall in many batches."""
    parts.series = parts.series.sample(frac=1.0, random_state=seed).reset_index(drop=True)
    return parts


@pytest.mark.parametrize(
    ("break_it", "words"),
    [
        ("duplicate", "B02 on 2001-03-02"),
        ("gap", "B04"),
        ("absent", "B05"),
        ("bad_date", "not-a-date"),
    ],
)
def test_problems_spread_over_batches_give_the_whole_table_message(
    tmp_path, region_parts, monkeypatch, break_it, words
):
    table = _rows_shuffled(region_parts).series
    if break_it == "duplicate":
        row = table[(table["basin_id"] == "B02") & (table["date"] == "2001-03-02")]
        table = pd.concat([table, row], ignore_index=True)
    elif break_it == "gap":
        table = table.drop(table.index[(table["basin_id"] == "B04")][100:103])
    elif break_it == "absent":
        table = table[table["basin_id"] != "B05"]
    else:
        table["date"] = table["date"].astype(str)
        table.loc[table.index[5], "date"] = "not-a-date"
    region_parts.series = table.reset_index(drop=True)
    folder = write_region(tmp_path / "r", region_parts)
    whole = _message(folder)
    monkeypatch.setattr(series, "BATCH_ROWS", SMALL_BATCH)
    assert _message(folder) == whole
    assert words in whole


def test_float32_storage_keeps_the_scores_to_1e_5(tmp_path, region_parts, monkeypatch):
    # Two routes to the same leave-one-out scores: series held as float32 (default) and as
    # float64; the scores must agree to 1e-5 relative, or 1e-6 absolute for a score near zero
    # (the rule of docs/scale.md; the scores are of order 1).
    from regional.pipeline import run

    folder = write_region(tmp_path / "r", region_parts)
    compact = run(folder).scores
    monkeypatch.setattr(series, "SERIES_DTYPE", np.float64)
    wide = run(folder).scores
    assert load_region(folder).precip_mm.to_numpy().dtype == np.float64
    numbers = ["nse", "kge", "kge_r", "kge_alpha", "kge_beta", "log_nse", "pbias"]
    pd.testing.assert_frame_equal(compact.drop(columns=numbers), wide.drop(columns=numbers))
    np.testing.assert_allclose(compact[numbers], wide[numbers], rtol=1e-5, atol=1e-6)


def _converted(tmp_path, region_parts) -> tuple:
    """The tiny region and a copy of it whose [series] path names its series store."""
    from regional.region import convert_series

    folder = write_region(tmp_path / "source", region_parts)
    store = tmp_path / "store.parquet"
    n_basins, n_rows = convert_series(folder, store)
    assert (n_basins, n_rows) == (6, len(region_parts.series))
    region_parts.config["series"]["path"] = str(store)
    return folder, write_region(tmp_path / "from_store", region_parts), store


def test_region_read_from_its_store_holds_the_same_tables(tmp_path, region_parts):
    folder, from_store, _ = _converted(tmp_path, region_parts)
    first, second = load_region(folder), load_region(from_store)
    for table in ("precip_mm", "pet_mm", "temp_c", "flow_mm"):
        pd.testing.assert_frame_equal(getattr(second, table), getattr(first, table))
    pd.testing.assert_frame_equal(second.attributes, first.attributes)


def test_a_task_reads_only_its_own_basins_rows(tmp_path, region_parts):
    # Second route to the count: the rows of those basins in the long table written.
    from regional.config import load_settings

    _, from_store, store = _converted(tmp_path, region_parts)
    region = load_region(from_store)
    reader = series.store_reader(load_settings(from_store), region.dates, with_temp=True)
    chunk = ["B02", "B05"]
    read = reader.read(chunk)
    expected = int(region_parts.series["basin_id"].isin(chunk).sum())
    assert read.rows_read == expected < len(region_parts.series)
    for name, table in read.tables.items():
        assert list(table.columns) == chunk
        pd.testing.assert_frame_equal(table, getattr(region, name)[chunk])
    # basins out of the store's order, read at once over a part of the dates
    part = region.dates[10:-10]
    reader = series.store_reader(load_settings(from_store), part, with_temp=True)
    chunk = ["B05", "B01", "B03"]
    for name, table in reader.read(chunk).tables.items():
        pd.testing.assert_frame_equal(table, getattr(region, name).loc[part, chunk])


def test_a_plain_parquet_file_is_not_a_store(tmp_path, region_parts):
    from regional.config import load_settings

    region_parts.series_name = "series.parquet"
    region_parts.config["series"]["path"] = "series.parquet"
    folder = write_region(tmp_path / "r", region_parts)
    dates = load_region(folder).dates
    assert series.store_reader(load_settings(folder), dates, with_temp=False) is None


def test_a_store_of_flow_in_m3s_gives_flow_in_mm_on_the_worker(tmp_path, region_parts):
    # Two routes to mm/day: the region's own conversion when read (region.flow_mm) and the
    # reader's, which converts on the worker with the areas it carries.
    from regional.config import load_settings

    series_keys = region_parts.config["series"]
    series_keys["flow_m3s"] = series_keys.pop("flow")
    _, from_store, _ = _converted(tmp_path, region_parts)
    region = load_region(from_store)
    settings = load_settings(from_store)
    reader = series.store_reader(
        settings, region.dates, with_temp=False, area_km2=region.attributes["area_km2"]
    )
    flow = reader.read(["B01", "B03"]).tables["flow_mm"]
    assert "temp_c" not in reader.read(["B01"]).tables
    np.testing.assert_allclose(flow, region.flow_mm[["B01", "B03"]], rtol=1e-6)


@pytest.mark.parametrize("unit", ["mm", "m3s"])
def test_a_region_left_in_its_store_gives_the_region_held_as_grids(tmp_path, region_parts, unit):
    # Two routes to one region: the series read into grids, and left in the store (checked and
    # summarised a block of basins at a time, blocks of 4 so that the 6 basins span two);
    # the attributes, basins, notes and warnings agree, and every table read back equals
    # the grid's.
    if unit == "m3s":
        keys = region_parts.config["series"]
        keys["flow_m3s"] = keys.pop("flow")
    _, from_store, _ = _converted(tmp_path, region_parts)
    held = load_region(from_store)
    with pytest.MonkeyPatch.context() as patch:
        patch.setattr(series, "STORE_BLOCK", 4)
        patch.setattr(series, "BATCH_ROWS", 4 * 1095)  # 4 basins' records of 1,095 days
        left = load_region(from_store, series_in_store=True)
    assert isinstance(left.precip_mm, series.StoreTable)
    pd.testing.assert_frame_equal(left.attributes, held.attributes)
    assert (left.gauged, left.ungauged, left.constant_flow) == (
        held.gauged,
        held.ungauged,
        held.constant_flow,
    )
    assert (left.notes, left.warnings) == (held.notes, held.warnings)
    assert left.dates.equals(held.dates)
    for name in ("precip_mm", "pet_mm", "temp_c", "flow_mm"):
        table, grid = getattr(left, name), getattr(held, name)
        assert table.index.equals(grid.index) and table.columns.equals(grid.columns)
        pd.testing.assert_frame_equal(table[list(grid.columns)], grid)
        part = grid.index[30:40]
        pd.testing.assert_frame_equal(
            table.loc[part, ["B03", "B01"]], grid.loc[part, ["B03", "B01"]]
        )
        pd.testing.assert_frame_equal(
            table.iloc[5:9].reindex(columns=["B02"]), grid.iloc[5:9][["B02"]]
        )


def _store_of(tmp_path, region_parts, table: pd.DataFrame):
    """The tiny region reading a series store written from ``table`` as given (one row group
    per basin of the layer, in the layer's order; not checked, unlike `regional convert`)."""
    from regional import io

    basins = sorted(region_parts.series["basin_id"].unique())
    table = table.assign(date=pd.to_datetime(table["date"]))
    parts = (table[table["basin_id"] == basin] for basin in basins)
    store = io.write_series_store(tmp_path / "bad.parquet", parts, basins=basins)
    region_parts.config["series"]["path"] = str(store)
    return write_region(tmp_path / "from_bad_store", region_parts)


@pytest.mark.parametrize(
    ("break_it", "words"),
    [("negative", "B03"), ("duplicate", "B02"), ("gap", "B04"), ("absent", "B05")],
)
def test_a_bad_store_left_in_place_gives_the_message_of_the_grids(
    tmp_path, region_parts, monkeypatch, break_it, words
):
    # Two routes to the message: the store read into grids (streamed, as any Parquet file)
    # and checked a block of 2 basins at a time when the series stay in it.
    table = region_parts.series.copy()
    if break_it == "negative":
        table.loc[table.index[table["basin_id"] == "B03"][40], "precip_mm"] = -3.0
    elif break_it == "duplicate":
        row = table[(table["basin_id"] == "B02") & (table["date"] == "2001-03-02")]
        table = pd.concat([table, row]).sort_values(["basin_id", "date"], kind="stable")
    elif break_it == "gap":
        table = table.drop(table.index[table["basin_id"] == "B04"][100:103])
    else:
        table = table[table["basin_id"] != "B05"]
    folder = _store_of(tmp_path, region_parts, table.reset_index(drop=True))
    held = _message(folder)
    monkeypatch.setattr(series, "STORE_BLOCK", 2)
    monkeypatch.setattr(series, "BATCH_ROWS", 2 * 1095)  # 2 basins' records of 1,095 days
    with pytest.raises(InputError) as caught:
        load_region(folder, series_in_store=True)
    assert str(caught.value) == held
    assert words in held


def test_a_store_whose_row_group_holds_another_basin_is_refused(tmp_path, region_parts):
    # The workers place a row group's records by the basin the store lists for it: a group
    # holding another basin's records would put them in the wrong column, so it is refused.
    from regional import io

    basins = sorted(region_parts.series["basin_id"].unique())
    table = region_parts.series.assign(date=pd.to_datetime(region_parts.series["date"]))
    listed = [basins[1], basins[0], *basins[2:]]  # the first two groups swapped in the list
    parts = (table[table["basin_id"] == basin] for basin in basins)
    store = io.write_series_store(tmp_path / "swapped.parquet", parts, basins=listed)
    region_parts.config["series"]["path"] = str(store)
    folder = write_region(tmp_path / "r", region_parts)
    with pytest.raises(InputError, match="row 1: row group 0 of the series store holds a record"):
        load_region(folder, series_in_store=True)
