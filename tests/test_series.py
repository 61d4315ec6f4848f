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
