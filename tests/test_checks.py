"""Tests of regional.checks: the rule table, each check's detection and its message."""

from __future__ import annotations

import geopandas as gpd
import numpy as np
import pandas as pd
import pytest
from affine import Affine
from shapely.geometry import Point, Polygon, box

from regional import checks
from regional.errors import InputError, InputWarning
from regional.io import Overlay, Raster

IDS = ("a", "b", "c")


def basins(geoms=None, **columns) -> gpd.GeoDataFrame:
    geoms = geoms or [box(i * 10, 0, i * 10 + 5, 5) for i in range(3)]
    ids = pd.Index(columns.pop("ids", IDS), name="basin_id")
    return gpd.GeoDataFrame(columns, geometry=geoms, index=ids, crs="EPSG:32633")


def long_table(n_days=5, ids=IDS, start="2001-01-01") -> pd.DataFrame:
    dates = pd.date_range(start, periods=n_days, freq="D").strftime("%Y-%m-%d")
    rows = [(basin, date, 1.0, 2.0, 0.5) for basin in ids for date in dates]
    frame = pd.DataFrame(rows, columns=["id", "day", "p", "e", "q"])
    frame.index = pd.RangeIndex(2, len(frame) + 2, name="line")
    return frame


def run_series(raw, basin_ids=IDS):
    return checks.check_series(
        raw,
        source="s.csv",
        id_column="id",
        date_column="day",
        forcing_columns=["p", "e"],
        flow_column="q",
        basin_ids=list(basin_ids),
    )


def test_table_is_complete():
    assert len(checks.CHECKS) == len({check.name for check in checks.CHECKS.values()})
    for name, check in checks.CHECKS.items():
        assert check.name == name
        assert check.rule and check.fix and check.severity in ("error", "warning")
    assert {"flow_gap", "short_calibration"} == {
        name for name, check in checks.CHECKS.items() if check.severity == "warning"
    }


def test_message_shape():
    rule, fix = checks.CHECKS["zero_area"].rule, checks.CHECKS["zero_area"].fix
    assert checks.message("zero_area", "f.gpkg", "basin 'x'") == (
        f"f.gpkg: {rule}; found basin 'x'. Fix: {fix}."
    )


# ----------------------------------------------------------------------------- basins


def test_valid_polygons_and_points():
    assert checks.check_basins(basins(), source="f") is False
    points = basins([Point(0, 0), Point(1, 1), Point(2, 2)], area_km2=[1.0, 2.0, 3.0])
    assert checks.check_basins(points, source="f") is True


def test_missing_ids_named_by_row():
    frame = basins(ids=["a", np.nan, "c"])
    with pytest.raises(
        InputError, match=r"f: every feature needs a basin id; found 1 row: row 2\."
    ):
        checks.check_basins(frame, source="f")


def test_mixed_geometry_kinds():
    frame = basins([box(0, 0, 1, 1), Point(5, 5), box(2, 2, 3, 3)])
    with pytest.raises(InputError, match=r"found 2 polygons and 1 points .*basin 'b' \(row 2\)"):
        checks.check_basins(frame, source="f")


def test_lines_are_not_basins():
    from shapely.geometry import LineString

    frame = basins([box(0, 0, 1, 1), LineString([(0, 0), (1, 1)]), box(2, 2, 3, 3)])
    with pytest.raises(
        InputError, match=r"all polygons .* found basin 'b' \(row 2\): 'LineString'"
    ):
        checks.check_basins(frame, source="f")


def test_non_numeric_area_column():
    frame = basins(area_km2=["12", "n/a", "3"])
    with pytest.raises(InputError, match=r"column 'area_km2'.*basin 'b' \(row 2\): 'n/a'"):
        checks.check_basins(frame, source="f")


def test_many_offenders_are_capped():
    frame = basins([Polygon()] * 8, ids=[f"x{i}" for i in range(8)])
    with pytest.raises(InputError, match=r"basin 'x4' \(row 5\): empty geometry and 3 more"):
        checks.check_basins(frame, source="f")


def test_overlay_and_raster_checks():
    bowtie = Polygon([(0, 0), (5, 5), (5, 0), (0, 8)])
    frame = gpd.GeoDataFrame({"v": [1.0, 2.0]}, geometry=[box(0, 0, 1, 1), bowtie], crs=3035)
    with pytest.raises(
        InputError, match=r"overlay soils.gpkg:soils: polygons must be valid.*row 2"
    ):
        checks.check_overlay(Overlay(frame=frame, fields=("v",), source="soils.gpkg:soils"))
    no_crs = Overlay(frame=frame.set_crs(None, allow_override=True), fields=("v",), source="s")
    with pytest.raises(InputError, match=r"overlay s: the data need a coordinate reference"):
        checks.check_overlay(no_crs)
    raster = Raster(values=np.zeros((2, 2)), transform=Affine.identity(), crs=None, path="d.tif")
    with pytest.raises(InputError, match=r"raster d.tif: the data need a coordinate reference"):
        checks.check_raster(raster)


# ----------------------------------------------------------------------------- series


def test_clean_table_is_converted():
    clean = run_series(long_table())
    assert list(clean.columns) == ["basin_id", "date", "p", "e", "q"]
    assert clean["date"].dtype == "datetime64[ns]"
    assert clean["p"].dtype == np.float64
    assert list(clean.index[:2]) == [2, 3]


def test_datetime_date_column_is_accepted():
    raw = long_table()
    raw["day"] = pd.to_datetime(raw["day"])
    raw.index = pd.RangeIndex(1, len(raw) + 1, name="row")
    assert run_series(raw)["date"].iloc[-1] == pd.Timestamp("2001-01-05")


def test_dates_with_time_of_day_are_rejected():
    raw = long_table()
    raw.loc[4, "day"] = "2001-01-03T12:00"
    with pytest.raises(
        InputError, match=r"ISO calendar days.*basin 'a' \(line 4\): '2001-01-03T12:00'"
    ):
        run_series(raw)


def test_row_word_follows_the_index_name():
    raw = long_table()
    raw.index = pd.RangeIndex(1, len(raw) + 1, name="row")
    raw.loc[7, "p"] = -1.0
    with pytest.raises(InputError, match=r"basin 'b' \(row 7\): -1"):
        run_series(raw)


def test_negative_or_infinite_flow():
    raw = long_table()
    raw.loc[3, "q"] = -999.0
    with pytest.raises(InputError, match=r"column 'q'.*zero or positive.*\(line 3\): -999"):
        run_series(raw)
    raw.loc[3, "q"] = np.inf
    with pytest.raises(InputError, match=r"column 'q'.*\(line 3\): inf"):
        run_series(raw)


def test_empty_flow_is_allowed():
    raw = long_table()
    raw["q"] = np.nan
    assert run_series(raw)["q"].isna().all()


def test_non_numeric_flow():
    raw = long_table().astype({"q": object})
    raw.loc[5, "q"] = "dry"
    with pytest.raises(InputError, match=r"column 'q': values must be numbers.*'dry'"):
        run_series(raw)


def test_missing_series_id():
    raw = long_table()
    raw.loc[6, "id"] = np.nan
    with pytest.raises(InputError, match=r"column 'id': every record .* 1 line: line 6"):
        run_series(raw)


def test_common_period_and_periods():
    first = pd.Series(pd.to_datetime(["2001-01-01", "2003-01-01"]), index=["a", "b"])
    last = pd.Series(pd.to_datetime(["2002-12-31", "2004-12-31"]), index=["a", "b"])
    with pytest.raises(InputError, match=r"basin 'b' starts on 2003-01-01 but basin 'a' ends"):
        checks.check_common_period(first, last, source="s")
    start, end = pd.Timestamp("2001-01-01"), pd.Timestamp("2001-12-31")
    period = (pd.Timestamp("2001-06-01"), pd.Timestamp("2002-01-31"))
    with pytest.raises(InputError, match=r"\[model\] calibration.*2001-06-01..2002-01-31"):
        checks.check_periods({"calibration": period}, start=start, end=end, source="r.toml")


# ----------------------------------------------------------------------------- flow


def test_flow_gap_days_by_hand():
    nan = np.nan
    flow = pd.DataFrame(
        {"a": [nan, 1, nan, nan, 2, nan], "b": [nan] * 6, "c": [1, 1, 1, 1, 1, 1]},
        index=pd.date_range("2001-01-01", periods=6),
    )
    # a: observed on days 2 and 5, days 3-4 missing inside the record; leading/trailing not gaps
    assert checks.flow_gap_days(flow).to_dict() == {"a": 2, "b": 0, "c": 0}


def test_warn_flow_gaps_counts():
    flow = pd.DataFrame({"a": [1.0, np.nan, 1.0], "b": [1.0, 1.0, 1.0]})
    with pytest.warns(
        InputWarning, match=r"q.csv: observed flow .* 1 of 2 basins .* 'a' \(1 days\)"
    ):
        checks.warn_flow_gaps(flow, source="q.csv")


def test_short_calibration_warns_and_too_few_gauged_fails():
    period = (pd.Timestamp("2001-01-01"), pd.Timestamp("2004-12-31"))
    observed = pd.Series({"a": 1400, "b": 1400, "c": 30, "d": 0})
    with pytest.warns(
        InputWarning, match=r"at least 365 observed days.*1 basins .*'c' \(30 days\)"
    ):
        checks.check_gauged(observed, source="q", period=period)
    with pytest.raises(InputError, match=r"found 2 gauged of 3 basins"):
        checks.check_gauged(observed.drop("c"), source="q", period=period)


def test_checks_are_vectorised_over_a_large_table():
    # 200 basins x 10 years (730 000 records): detection must find the one bad record.
    ids = [f"g{i:03d}" for i in range(200)]
    dates = pd.date_range("2001-01-01", periods=3650).strftime("%Y-%m-%d")
    raw = pd.DataFrame(
        {
            "id": np.repeat(ids, len(dates)),
            "day": np.tile(dates, len(ids)),
            "p": 1.0,
            "e": 1.0,
            "q": 1.0,
        }
    )
    raw.index = pd.RangeIndex(2, len(raw) + 2, name="line")
    assert len(run_series(raw, ids)) == 730_000
    raw.loc[500_002, "e"] = -0.5
    with pytest.raises(InputError, match=r"basin 'g136' \(line 500002\): -0.5"):
        run_series(raw, ids)
