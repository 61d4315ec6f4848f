"""Input checks, driven by one table of (check name, rule, fix): :data:`CHECKS`.

Each public function runs the checks of one input in table order and stops at the first one that
fails with an :class:`~regional.errors.InputError` whose message has the project's shape:

    <where: file, layer or column>: <rule>; found <basins, rows and values>. Fix: <how>.

Recoverable problems (gaps in observed flow, short records) are
:class:`~regional.errors.InputWarning` with counts. Every check is vectorised over rows; nothing
loops in Python over records. Rows are named as the user sees them: ``line N`` in a text file
(the header is line 1) and ``row N`` (1-based) in other formats.
"""

from __future__ import annotations

import warnings
from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import geopandas as gpd
import numpy as np
import pandas as pd
import shapely

from regional.errors import InputError, InputWarning
from regional.io import Overlay, Raster

#: Fewer gauged basins than this cannot support a transfer.
MIN_GAUGED = 3
#: Gauged basins the regression transfer needs: leave-one-out fits it on all but one, and a fit
#: needs the intercept plus 2 residual degrees of freedom (regional.transfer.regression).
MIN_GAUGED_REGRESSION = 4
#: Gauged basins with fewer observed days than this in the calibration period are warned about.
MIN_CALIBRATION_DAYS = 365
#: How many offenders a message lists before "and N more".
SHOWN = 5
#: Default ceiling of daily precipitation, mm/day (``[series] max_precip_mm_per_day``). The
#: greatest one-day rainfall on record is about 1,825 mm (Foc-Foc, La Reunion, 7-8 January
#: 1966; WMO World Weather and Climate Extremes Archive); a value above the ceiling is a unit
#: or missing-value-code error, not weather.
MAX_PRECIP_MM_PER_DAY = 2000.0
#: Ceiling of daily potential evapotranspiration, mm/day (common practice, no source: open-water
#: evaporation in the hottest deserts stays below about 15 mm/day).
MAX_PET_MM_PER_DAY = 30.0
#: Plausible daily air temperature, deg C: the extremes on record are about -89 deg C (Vostok,
#: 1983) and 57 deg C (Death Valley, 1913) in the WMO archive of weather extremes (from memory).
TEMP_RANGE_C = (-90.0, 60.0)


@dataclass(frozen=True)
class Check:
    """One input rule: its name, the rule in words, and how to fix a breach."""

    name: str
    rule: str
    fix: str
    severity: str = "error"


CHECKS: dict[str, Check] = {
    check.name: check
    for check in (
        # basins layer (and overlays, raster)
        Check(
            "missing_id", "every feature needs a basin id", "fill in the id or delete the feature"
        ),
        Check(
            "duplicate_id",
            "each basin id must appear once",
            "give every basin its own id, or delete the repeated feature",
        ),
        Check(
            "no_crs",
            "the data need a coordinate reference system (CRS) for areas and distances",
            "assign the CRS in your GIS (e.g. 'Set layer CRS', EPSG:4326 or a projected CRS) "
            "and save the file again",
        ),
        Check(
            "empty_geometry",
            "every basin needs a geometry",
            "draw the basin polygon (or outlet point), or delete the feature",
        ),
        Check(
            "geometry_type",
            "basins must be all polygons (Polygon, MultiPolygon) or all points (Point)",
            "convert the features, or split points and polygons into separate layers",
        ),
        Check(
            "invalid_geometry",
            "polygons must be valid (no self-intersection, closed rings)",
            "repair them (e.g. GIS 'Fix geometries' or shapely.make_valid) and save again",
        ),
        Check(
            "flow_m3s_area",
            "flow in m3/s ([series] flow_m3s) is converted to mm/day with the basin area, so "
            "every basin needs a positive area in km2",
            "give the area in an 'area_km2' column (or the column named by [basins] area), or "
            "give polygons, or give flow in mm/day with [series] flow",
        ),
        Check(
            "point_area",
            "basins given as points need their area in km2 in a column",
            "add an 'area_km2' column, or name the area column with [basins] area = \"...\"",
        ),
        Check(
            "zero_area",
            "every basin must have a positive area",
            "correct the polygon or the area value (km2), or delete the basin",
        ),
        # series table
        Check(
            "series_missing_id",
            "every record of the series needs a basin id",
            "fill in the id or delete the record",
        ),
        Check(
            "series_unknown_id",
            "every basin id in the series must be a basin of the basins layer",
            "add the basins to the layer, remove their records, or correct the ids "
            "(ids are compared as text)",
        ),
        Check(
            "basin_without_series",
            "every basin of the basins layer needs daily series",
            "add records for these basins to the series file, or delete them from the layer",
        ),
        Check(
            "bad_date",
            "dates must be ISO calendar days (YYYY-MM-DD)",
            "write the dates as YYYY-MM-DD, one calendar day per record",
        ),
        Check(
            "duplicate_date",
            "a basin may have one record per date",
            "keep one record per basin and date",
        ),
        Check(
            "non_numeric",
            "values must be numbers (decimal point '.', empty for missing flow)",
            "correct the values; leave missing observed flow empty",
        ),
        Check(
            "non_finite_forcing",
            "precipitation, PET and temperature must be given on every day of a basin's record",
            "fill the missing forcing (e.g. from a neighbouring station or grid)",
        ),
        Check(
            "negative_forcing",
            "precipitation and PET must not be negative (mm/day)",
            "correct the values; a missing-value code such as -999 must be filled instead",
        ),
        Check(
            "implausible_precip",
            "daily precipitation must stay below the plausibility ceiling [series] "
            "max_precip_mm_per_day (default 2,000 mm/day; the greatest one-day rainfall on "
            "record is about 1,825 mm, WMO archive of weather extremes)",
            "check the unit (mm/day, not 0.1 mm or m3) and missing-value codes such as 99999; "
            "raise max_precip_mm_per_day only for a value you have verified",
        ),
        Check(
            "implausible_pet",
            f"daily PET must not exceed {MAX_PET_MM_PER_DAY:g} mm/day",
            "check the unit (mm/day) and missing-value codes",
        ),
        Check(
            "implausible_temp",
            f"daily temperature must lie within {TEMP_RANGE_C[0]:g}..{TEMP_RANGE_C[1]:g} deg C "
            "(the extremes on record, WMO archive of weather extremes)",
            "check the unit (deg C, not K or deg F) and missing-value codes",
        ),
        Check(
            "bad_flow",
            "observed flow must be zero or positive and finite",
            "correct the values; leave a missing day empty instead of a code such as -999",
        ),
        Check(
            "forcing_gap",
            "forcing must cover every day between a basin's first and last record",
            "add the missing days (forcing is needed on every day that is simulated)",
        ),
        Check(
            "no_common_period",
            "the basins' forcing records must share a common period",
            "extend the forcing so that all basins cover the same days",
        ),
        Check(
            "period_outside_record",
            "the [model] periods must lie within the forcing common to all basins",
            "move the period in region.toml inside the common forcing period",
        ),
        Check(
            "too_few_gauged",
            f"at least {MIN_GAUGED} basins need observed flow in the calibration period",
            "add observed flow, or widen [model] calibration to cover the observations",
        ),
        Check(
            "too_few_for_regression",
            f"the regression transfer needs at least {MIN_GAUGED_REGRESSION} gauged basins "
            "(leave-one-out fits it on all but one; a fit needs the intercept and 2 residual "
            "degrees of freedom)",
            "drop 'regression' from [transfer] methods, or add observed flow at more basins",
        ),
        # the user's parameter table ([model] parameters)
        Check(
            "parameters_missing_column",
            "the parameter table needs a column for every parameter of every model in "
            "[model] name",
            "add the column (parameter names and units are in docs/config.md), or drop the "
            "model from [model] name",
        ),
        Check(
            "parameters_unknown_column",
            "every column of the parameter table other than basin_id must be a parameter of a "
            "model in [model] name (snow parameters are set for the whole region in [model])",
            "remove or rename the column",
        ),
        Check(
            "parameters_missing_id",
            "every row of the parameter table needs a basin id",
            "fill in the id or delete the row",
        ),
        Check(
            "parameters_duplicate_id",
            "each basin may appear once in the parameter table",
            "keep one row per basin",
        ),
        Check(
            "parameters_unknown_id",
            "every basin of the parameter table must be a basin of the basins layer",
            "correct the id (ids are compared as text) or delete the row",
        ),
        Check(
            "parameters_non_numeric",
            "parameter values must be numbers (decimal point '.')",
            "correct the value",
        ),
        Check(
            "parameters_missing_value",
            "every basin of the parameter table needs a value of every parameter",
            "fill in the value, or delete the row to calibrate the basin",
        ),
        Check(
            "parameters_out_of_bounds",
            "parameter values must lie within the model's bounds",
            "check the unit (e.g. k_per_day in 1/day) and the value; the bounds are in the "
            "model's page in docs/",
        ),
        Check(
            "flow_gap",
            "observed flow has missing days inside its record",
            "nothing is needed: missing days are left out of calibration and scoring; fill them "
            "only from a trusted source",
            severity="warning",
        ),
        Check(
            "short_calibration",
            f"gauged basins should have at least {MIN_CALIBRATION_DAYS} observed days (or half "
            "the days, in a shorter period) in the calibration period",
            "expect uncertain calibrated parameters there, or widen [model] calibration",
            severity="warning",
        ),
    )
}


# --------------------------------------------------------------------------------------------
# Public checks
# --------------------------------------------------------------------------------------------


def check_basins(basins: gpd.GeoDataFrame, *, source: str, flow_in_m3s: bool = False) -> bool:
    """Check the basins layer read by :func:`regional.io.read_basins`.

    Parameters
    ----------
    basins : GeoDataFrame
        Indexed by basin_id (text, NaN for missing), rows in file order.
    source : str
        File and layer, for messages.
    flow_in_m3s : bool, default False
        Observed flow is in m3/s, so every basin needs a usable area.

    Returns
    -------
    bool
        True when the basins are points (outlets), False for polygons.

    Raises
    ------
    InputError
        Missing or duplicate ids, no CRS, empty, mixed or invalid geometry, no usable area.
    """
    rows = pd.Series(np.arange(1, len(basins) + 1), index=basins.index)
    ids = basins.index.to_series()
    _fail_if("missing_id", source, _rows_listing(rows[ids.isna().to_numpy()].to_numpy()))
    duplicated = ids.duplicated(keep=False).to_numpy()
    _fail_if("duplicate_id", source, _grouped_rows(ids[duplicated], rows[duplicated]))
    _fail_if("no_crs", source, "no CRS" if basins.crs is None else "")
    geoms = basins.geometry.to_numpy()
    empty = shapely.is_missing(geoms) | shapely.is_empty(geoms)
    _fail_if("empty_geometry", source, _basin_rows(ids[empty], rows[empty], "empty geometry"))
    kinds = basins.geometry.geom_type.to_numpy(dtype=object)
    is_point = _geometry_kind(kinds, ids, rows, source)
    _check_area(basins, rows, source, is_point=is_point, flow_in_m3s=flow_in_m3s)
    if not is_point:
        _check_valid(geoms, ids, rows, source)
    return is_point


def check_overlay(overlay: Overlay) -> None:
    """Check an overlay layer: CRS, empty and invalid polygons.

    Raises
    ------
    InputError
        No CRS, or an empty or invalid polygon (naming its row in the layer).
    """
    frame = overlay.frame
    source = f"overlay {overlay.source}"
    _fail_if("no_crs", source, "no CRS" if frame.crs is None else "")
    rows = pd.Series(np.arange(1, len(frame) + 1))
    geoms = frame.geometry.to_numpy()
    empty = shapely.is_missing(geoms) | shapely.is_empty(geoms)
    _fail_if("empty_geometry", source, _rows_listing(rows[empty].to_numpy()))
    invalid = ~shapely.is_valid(geoms)
    if invalid.any():
        reason = shapely.is_valid_reason(geoms[np.flatnonzero(invalid)[0]])
        found = f"{_rows_listing(rows[invalid].to_numpy())} (first: {reason})"
        _fail_if("invalid_geometry", source, found)


def check_raster(raster: Raster) -> None:
    """Check a raster: it needs a CRS.

    Raises
    ------
    InputError
        The raster has no CRS.
    """
    _fail_if("no_crs", f"raster {raster.path}", "no CRS" if raster.crs is None else "")


def check_series(
    raw: pd.DataFrame,
    *,
    source: str,
    id_column: str,
    date_column: str,
    forcing_columns: Sequence[str],
    flow_column: str,
    basin_ids: Sequence[str],
    max_precip_mm_per_day: float = MAX_PRECIP_MM_PER_DAY,
    whole: bool = True,
) -> pd.DataFrame:
    """Check the long series table read by :func:`regional.io.read_series` and convert it.

    Parameters
    ----------
    raw : DataFrame
        As read: ids as text, dates as text (or datetimes), values numeric or text; the index is
        the line (text files) or row number shown in messages.
    source : str
        The file (and table), for messages.
    id_column, date_column : str
        Column names of the basin id and the date.
    forcing_columns : sequence of str
        Precipitation and PET columns first (both must be >= 0), then temperature if given. All
        must be finite on every record.
    flow_column : str
        Observed flow (any unit); empty cells are missing days, values must be >= 0.
    basin_ids : sequence of str
        Ids of the basins layer.
    max_precip_mm_per_day : float, default 2000
        Plausibility ceiling of precipitation (mm/day); PET must stay at or below
        :data:`MAX_PET_MM_PER_DAY` and temperature within :data:`TEMP_RANGE_C`.
    whole : bool, default True
        ``raw`` is the whole table. False for one batch of rows of a streamed table
        (:func:`regional.io.iter_series`): the checks that need every row (basins without
        records, duplicated dates, gaps in the forcing) are then left to the caller.

    Returns
    -------
    DataFrame
        Same rows and index, columns ``basin_id`` (str), ``date`` (datetime64, midnight), the
        forcing columns and the flow column as float64.

    Raises
    ------
    InputError
        Missing or unknown ids, basins without records, unparsable or duplicated dates,
        non-numeric values, non-finite, negative or implausible forcing (naming file, column,
        basin, date and value), negative or infinite flow, gaps in the forcing.
    """
    rows = raw.index
    ids = raw[id_column]
    _check_ids(ids, rows, source=source, column=id_column, basin_ids=basin_ids, whole=whole)
    dates = _parse_dates(raw[date_column], ids, rows, source=f"{source}, column '{date_column}'")
    if whole:
        _check_duplicates(ids, dates, rows, source=f"{source}, column '{date_column}'")
    clean = {"basin_id": ids, "date": dates}
    for column in [*forcing_columns, flow_column]:
        clean[column] = _numbers(raw[column], ids, rows, source=f"{source}, column '{column}'")
    for column in forcing_columns:
        where = f"{source}, column '{column}'"
        values = clean[column]
        bad = ~np.isfinite(values.to_numpy())
        _fail_if("non_finite_forcing", where, _basin_rows(ids[bad], rows[bad], raw[column][bad]))
    for column in forcing_columns[:2]:
        values = clean[column]
        bad = (values < 0).to_numpy()
        found = _basin_rows(ids[bad], rows[bad], values[bad])
        _fail_if("negative_forcing", f"{source}, column '{column}'", found)
    ceilings = _plausible_ranges(forcing_columns, max_precip_mm_per_day)
    for column, (name, low, high) in ceilings.items():
        values = clean[column]
        bad = ((values < low) | (values > high)).to_numpy()
        found = _basin_dates(ids[bad], rows[bad], dates[bad], values[bad])
        _fail_if(name, f"{source}, column '{column}'", found)
    flow = clean[flow_column]
    bad = ((flow < 0) | np.isinf(flow)).to_numpy()
    _fail_if(
        "bad_flow",
        f"{source}, column '{flow_column}'",
        _basin_rows(ids[bad], rows[bad], flow[bad]),
    )
    frame = pd.DataFrame(clean, index=rows)
    if whole:
        _check_forcing_gaps(frame, source=f"{source}, column '{date_column}'")
    return frame


def _check_duplicates(ids: pd.Series, dates: pd.Series, rows: pd.Index, *, source: str) -> None:
    duplicated = pd.DataFrame({"id": ids, "date": dates}).duplicated(keep=False).to_numpy()
    found = _grouped_rows(
        ids[duplicated] + " on " + dates[duplicated].dt.strftime("%Y-%m-%d"), rows[duplicated]
    )
    _fail_if("duplicate_date", source, found)


def check_common_period(
    first: pd.Series, last: pd.Series, *, source: str
) -> tuple[pd.Timestamp, pd.Timestamp]:
    """Return the period covered by every basin's forcing.

    Parameters
    ----------
    first, last : Series of Timestamp
        First and last forcing date per basin.

    Raises
    ------
    InputError
        The records do not overlap (naming the basins that start last and end first).
    """
    start, end = first.max(), last.min()
    if start > end:
        found = (
            f"basin '{first.idxmax()}' starts on {start:%Y-%m-%d} but basin '{last.idxmin()}' "
            f"ends on {end:%Y-%m-%d}"
        )
        _fail_if("no_common_period", source, found)
    return start, end


def check_periods(
    periods: dict[str, tuple[pd.Timestamp, pd.Timestamp] | None],
    *,
    start: pd.Timestamp,
    end: pd.Timestamp,
    source: str,
) -> None:
    """Check that the named periods lie inside ``start..end`` (the common forcing).

    Raises
    ------
    InputError
        A period reaches outside the common forcing period.
    """
    for name, period in periods.items():
        if period is not None and (period[0] < start or period[1] > end):
            found = (
                f"{name} {period[0]:%Y-%m-%d}..{period[1]:%Y-%m-%d}, common forcing "
                f"{start:%Y-%m-%d}..{end:%Y-%m-%d}"
            )
            _fail_if("period_outside_record", f"{source} [model] {name}", found)


def check_gauged(
    n_observed: pd.Series, *, source: str, period: tuple[pd.Timestamp, pd.Timestamp]
) -> None:
    """Check the number of gauged basins and warn about short calibration records.

    Parameters
    ----------
    n_observed : Series of int
        Observed flow days in the calibration period per basin (0: ungauged).
    source : str
        The flow column and file, for messages.
    period : (Timestamp, Timestamp)
        The calibration period.

    Raises
    ------
    InputError
        Fewer than :data:`MIN_GAUGED` gauged basins.
    """
    gauged = n_observed[n_observed > 0]
    span = f"{period[0]:%Y-%m-%d}..{period[1]:%Y-%m-%d}"
    if len(gauged) < MIN_GAUGED:
        found = f"{len(gauged)} gauged of {len(n_observed)} basins in {span}"
        _fail_if("too_few_gauged", source, found)
    period_days = (period[1] - period[0]).days + 1
    short = gauged[gauged < min(MIN_CALIBRATION_DAYS, period_days / 2)]
    if len(short):
        listing = _listing([f"'{basin}' ({days} days)" for basin, days in short.items()])
        _warn("short_calibration", source, f"{len(short)} basins in {span}: {listing}")


def check_gauged_for_methods(n_gauged: int, *, methods: Sequence[str], source: str) -> None:
    """Check that the transfer methods can be validated with ``n_gauged`` gauged basins.

    Raises
    ------
    InputError
        ``regression`` is asked for with fewer than :data:`MIN_GAUGED_REGRESSION` gauged basins.
    """
    if "regression" in methods and n_gauged < MIN_GAUGED_REGRESSION:
        _fail_if("too_few_for_regression", f"{source} [transfer] methods", f"{n_gauged} gauged")


def flow_gap_days(flow: pd.DataFrame) -> pd.Series:
    """Missing days inside each basin's observed-flow record.

    Parameters
    ----------
    flow : DataFrame, shape (days, basins)
        Observed flow on continuous daily dates; NaN where missing.

    Returns
    -------
    Series of int
        Per basin, the missing days between its first and last observation (0 without gaps or
        without any observation).
    """
    valid = flow.notna().to_numpy()
    has_any = valid.any(axis=0)
    first = np.argmax(valid, axis=0)
    last = valid.shape[0] - 1 - np.argmax(valid[::-1], axis=0)
    inside = np.where(has_any, last - first + 1, 0)
    return pd.Series(inside - valid.sum(axis=0), index=flow.columns, name="flow_gap_days")


def warn_flow_gaps(flow: pd.DataFrame, *, source: str) -> pd.Series:
    """Warn (:class:`~regional.errors.InputWarning`) about gaps in observed flow, with counts.

    Parameters
    ----------
    flow : DataFrame, shape (days, basins)
        Observed flow on continuous daily dates; NaN where missing.
    source : str
        The flow column and file, for messages.

    Returns
    -------
    Series of int
        :func:`flow_gap_days` of ``flow``.
    """
    gaps = flow_gap_days(flow)
    warn_gap_days(gaps, n_observed=int(flow.notna().any(axis=0).sum()), source=source)
    return gaps


def warn_gap_days(gaps: pd.Series, *, n_observed: int, source: str) -> None:
    """The warning of :func:`warn_flow_gaps` from the gap days already counted (e.g. a block
    of basins at a time) and the number of basins with any observed flow."""
    with_gaps = gaps[gaps > 0].sort_values(ascending=False)
    if len(with_gaps):
        listing = _listing([f"'{basin}' ({days} days)" for basin, days in with_gaps.items()])
        found = (
            f"{len(with_gaps)} of {n_observed} basins with observed flow, "
            f"{int(with_gaps.sum())} missing days in all: {listing}"
        )
        _warn("flow_gap", source, found)


def check_parameter_table(
    raw: pd.DataFrame,
    *,
    source: str,
    bounds: Mapping[str, tuple[float, float, str]],
    basin_ids: Sequence[str],
) -> pd.DataFrame:
    """Check the user's parameter table read by :func:`regional.io.read_parameter_table`.

    Parameters
    ----------
    raw : DataFrame
        ``basin_id`` (text) and parameter columns as read; the index is the line or row.
    source : str
        The file, for messages.
    bounds : mapping
        Parameter name -> (lower, upper, model name) of every model in ``[model] name``.
    basin_ids : sequence of str
        The basins of the basins layer (with or without observed flow: a basin without flow
        serves as a donor only).

    Returns
    -------
    DataFrame
        Indexed by ``basin_id``: one float column per parameter, in the order of ``bounds``.

    Raises
    ------
    InputError
        A missing or unknown column, a missing, repeated or unknown basin id, a non-numeric,
        missing or out-of-bounds value: naming the file, column, basin and line (or row).
    """
    columns = [c for c in raw.columns if c != "basin_id"]
    missing = [f"'{name}' (model '{bounds[name][2]}')" for name in bounds if name not in columns]
    present = ", ".join(f"'{c}'" for c in raw.columns)
    found = f"no column {_listing(missing)} among {present}" if missing else ""
    _fail_if("parameters_missing_column", source, found)
    unknown = [f"'{c}'" for c in columns if c not in bounds]
    _fail_if("parameters_unknown_column", source, _listing(unknown))
    ids, rows = raw["basin_id"], raw.index
    blank = ids.isna().to_numpy()
    _fail_if(
        "parameters_missing_id",
        f"{source}, column 'basin_id'",
        _rows_listing(rows[blank], word=rows.name or "row"),
    )
    repeated = ids.duplicated(keep=False).to_numpy()
    _fail_if(
        "parameters_duplicate_id",
        f"{source}, column 'basin_id'",
        _grouped_rows(ids[repeated], rows[repeated]),
    )
    outside = (~ids.isin(list(basin_ids))).to_numpy()
    _fail_if(
        "parameters_unknown_id",
        f"{source}, column 'basin_id'",
        _basin_rows(ids[outside], rows[outside]),
    )
    values = {}
    for name, (lower, upper, _) in bounds.items():
        where = f"{source}, column '{name}'"
        cell = raw[name]
        empty = cell.isna().to_numpy()
        _fail_if("parameters_missing_value", where, _basin_rows(ids[empty], rows[empty], "empty"))
        number = _numbers(cell, ids, rows, source=where, check="parameters_non_numeric")
        outside = ((number < lower) | (number > upper) | ~np.isfinite(number)).to_numpy()
        found = _basin_rows(ids[outside], rows[outside], cell[outside])
        _fail_if(
            "parameters_out_of_bounds", where, found and f"{found} (bounds {lower:g} to {upper:g})"
        )
        values[name] = number.to_numpy()
    return pd.DataFrame(values, index=pd.Index(ids.to_numpy(dtype=object), name="basin_id"))


def message(name: str, where: str, found: str) -> str:
    """The message of check ``name``: where, the rule, what was found, the fix."""
    check = CHECKS[name]
    return f"{where}: {check.rule}; found {found}. Fix: {check.fix}."


# --------------------------------------------------------------------------------------------
# Steps
# --------------------------------------------------------------------------------------------


def _fail_if(name: str, where: str, found: str) -> None:
    """Raise check ``name`` when ``found`` (the offenders, formatted) is not empty."""
    if found:
        raise InputError(message(name, where, found))


def _warn(name: str, where: str, found: str) -> None:
    warnings.warn(message(name, where, found), InputWarning, stacklevel=3)


def _geometry_kind(kinds: np.ndarray, ids: pd.Series, rows: pd.Series, source: str) -> bool:
    """True for a layer of points, False for polygons; anything else fails."""
    polygon = np.isin(kinds, ("Polygon", "MultiPolygon"))
    point = kinds == "Point"
    other = ~(polygon | point)
    _fail_if("geometry_type", source, _basin_rows(ids[other], rows[other], kinds[other]))
    if polygon.any() and point.any():
        found = (
            f"{int(polygon.sum())} polygons and {int(point.sum())} points (points: "
            f"{_basin_rows(ids[point], rows[point])})"
        )
        _fail_if("geometry_type", source, found)
    return bool(point.all())


def _check_valid(geoms: np.ndarray, ids: pd.Series, rows: pd.Series, source: str) -> None:
    invalid = ~shapely.is_valid(geoms)
    if invalid.any():
        reasons = shapely.is_valid_reason(geoms[invalid])
        _fail_if("invalid_geometry", source, _basin_rows(ids[invalid], rows[invalid], reasons))


def _check_area(
    basins: gpd.GeoDataFrame, rows: pd.Series, source: str, *, is_point: bool, flow_in_m3s: bool
) -> None:
    """Points need an area column; every area (column or polygon) must be positive."""
    ids = basins.index.to_series()
    has_column = "area_km2" in basins.columns
    if is_point and not has_column:
        found = f"a point layer without an 'area_km2' column ({len(basins)} basins)"
        _fail_if("flow_m3s_area" if flow_in_m3s else "point_area", source, found)
    if has_column:
        raw = basins["area_km2"]
        area = pd.to_numeric(raw, errors="coerce")
        bad = ~(area > 0).to_numpy()
        found = _basin_rows(ids[bad], rows[bad], raw[bad])
        _fail_if(
            "flow_m3s_area" if flow_in_m3s else "zero_area", f"{source}, column 'area_km2'", found
        )
    if not is_point:
        zero = ~(shapely.area(basins.geometry.to_numpy()) > 0)
        _fail_if("zero_area", source, _basin_rows(ids[zero], rows[zero], "polygon area 0"))


def _check_ids(
    ids: pd.Series,
    rows: pd.Index,
    *,
    source: str,
    column: str,
    basin_ids: Sequence[str],
    whole: bool = True,
) -> None:
    where = f"{source}, column '{column}'"
    missing = ids.isna().to_numpy()
    _fail_if("series_missing_id", where, _rows_listing(rows[missing], word=rows.name or "row"))
    known = pd.Index(basin_ids)
    unknown = ~ids.isin(known).to_numpy()
    if unknown.any():
        firsts = pd.Series(rows[unknown], index=ids[unknown].to_numpy()).groupby(level=0).min()
        found = _listing([f"'{b}' (first at {rows.name} {r})" for b, r in firsts.items()])
        found += _leading_zero_hint(firsts.index, known)
        _fail_if("series_unknown_id", where, f"{_count(len(firsts), 'unknown id')}: {found}")
    if not whole:
        return
    absent = known.difference(pd.Index(ids.unique()), sort=False)
    if len(absent):
        quoted = [f"'{basin}'" for basin in absent]
        found = f"{_count(len(absent), 'basin')} without records: {_listing(quoted)}"
        _fail_if("basin_without_series", where, found + _leading_zero_hint(absent, ids.unique()))


def _leading_zero_hint(unknown: Sequence[str], known: Sequence[str]) -> str:
    stripped = {str(basin).lstrip("0") for basin in known}
    close = [basin for basin in unknown if str(basin).lstrip("0") in stripped]
    if not close:
        return ""
    return (
        f" (e.g. '{close[0]}' matches an id that differs only by leading zeros: store ids as "
        "text in both files)"
    )


def parse_dates(raw: pd.Series, ids: pd.Series, rows: pd.Index, *, source: str) -> pd.Series:
    """Dates of a series table as datetime64 at midnight.

    Raises
    ------
    InputError
        A value that is not a date, or not at midnight (naming the basin and row).
    """
    return _parse_dates(raw, ids, rows, source=source)


def _parse_dates(raw: pd.Series, ids: pd.Series, rows: pd.Index, *, source: str) -> pd.Series:
    """Parse dates once per distinct text (a daily table repeats each date once per basin)."""
    if pd.api.types.is_datetime64_any_dtype(raw):
        stamps = pd.DatetimeIndex(raw)
        stamps = stamps.tz_localize(None) if stamps.tz is not None else stamps
        parsed = pd.Series(stamps.where(stamps == stamps.normalize()), index=raw.index)
    else:
        codes, uniques = pd.factorize(raw)
        stamps = pd.to_datetime(pd.Index(uniques).astype(str), format="ISO8601", errors="coerce")
        if getattr(stamps, "tz", None) is not None:
            stamps = stamps.tz_localize(None)
        stamps = stamps.where(stamps == stamps.normalize())
        if len(stamps) == 0:
            stamps = pd.DatetimeIndex([pd.NaT])
        parsed = pd.Series(stamps.take(np.maximum(codes, 0)), index=raw.index)
        parsed[codes < 0] = pd.NaT
    bad = parsed.isna().to_numpy()
    _fail_if("bad_date", source, _basin_rows(ids[bad], rows[bad], raw[bad]))
    return parsed.astype("datetime64[ns]")


def _numbers(
    raw: pd.Series, ids: pd.Series, rows: pd.Index, *, source: str, check: str = "non_numeric"
) -> pd.Series:
    if pd.api.types.is_bool_dtype(raw):
        raw = raw.astype(object)
    if pd.api.types.is_numeric_dtype(raw):
        return raw.astype(np.float64)
    values = pd.to_numeric(raw, errors="coerce").astype(np.float64)
    bad = (values.isna() & raw.notna()).to_numpy()
    _fail_if(check, source, _basin_rows(ids[bad], rows[bad], raw[bad]))
    return values


def _plausible_ranges(
    forcing_columns: Sequence[str], max_precip_mm_per_day: float
) -> dict[str, tuple[str, float, float]]:
    """Column -> (check name, lowest, highest plausible value) for precipitation, PET, temp."""
    names = ("implausible_precip", "implausible_pet", "implausible_temp")
    bounds = ((-np.inf, max_precip_mm_per_day), (-np.inf, MAX_PET_MM_PER_DAY), TEMP_RANGE_C)
    return {
        column: (name, *bound)
        for column, name, bound in zip(forcing_columns, names, bounds, strict=False)
    }


def _check_forcing_gaps(frame: pd.DataFrame, *, source: str) -> None:
    grouped = frame.groupby("basin_id", sort=False)["date"]
    first, last, count = grouped.min(), grouped.max(), grouped.size()
    expected = (last - first).dt.days + 1
    gappy = expected.index[(expected > count).to_numpy()]
    if not len(gappy):
        return
    subset = frame.loc[frame["basin_id"].isin(gappy), ["basin_id", "date"]]
    subset = subset.sort_values(["basin_id", "date"])
    subset = subset.assign(step=subset.groupby("basin_id", sort=False)["date"].diff())
    jumps = subset.loc[(subset["step"] > pd.Timedelta(days=1)).to_numpy()]
    first_jump = jumps.groupby("basin_id", sort=False).head(1)
    found = []
    for basin, row, date, step in zip(  # one entry per basin with a gap, not per record
        first_jump["basin_id"],
        first_jump.index,
        first_jump["date"],
        first_jump["step"],
        strict=True,
    ):
        missing = int(expected[basin] - count[basin])
        gap_start = date - step + pd.Timedelta(days=1)
        found.append(
            f"basin '{basin}': {_count(missing, 'missing day')}, the first from "
            f"{gap_start:%Y-%m-%d} to {date - pd.Timedelta(days=1):%Y-%m-%d} (before "
            f"{frame.index.name} {row})"
        )
    _fail_if("forcing_gap", source, f"{_count(len(found), 'basin')}: {_listing(found)}")


# --------------------------------------------------------------------------------------------
# Formatting offenders
# --------------------------------------------------------------------------------------------


def _listing(items: Sequence[str], most: int = SHOWN) -> str:
    items = list(items)
    shown = ", ".join(str(item) for item in items[:most])
    more = len(items) - most
    return shown + (f" and {more} more" if more > 0 else "")


def _count(number: int, word: str) -> str:
    return f"{number} {word}" + ("" if number == 1 else "s")


def _rows_listing(rows: Sequence[int], *, word: str = "row") -> str:
    rows = list(rows)
    if not rows:
        return ""
    plural = "s" if len(rows) > 1 else ""
    return f"{len(rows)} {word}{plural}: {word}{plural} {_listing([str(r) for r in rows])}"


def _basin_rows(ids: Sequence[str], rows: Sequence[int], values: object = None) -> str:
    """``basin 'a' (row 3): value`` for each offender, or '' when there is none.

    ``rows`` named ``"line"`` (a text file's line numbers) are shown as lines.
    """
    word = getattr(rows, "name", None) or "row"
    ids, rows = list(ids), list(rows)
    if not ids:
        return ""
    if values is None:
        shown = [""] * len(ids)
    elif isinstance(values, str):
        shown = [f": {values}"] * len(ids)
    else:
        shown = [f": {_shown(value)}" for value in list(values)[:SHOWN]]
    items = [
        f"basin '{basin}' ({word} {row}){value}"
        for basin, row, value in zip(ids[:SHOWN], rows[:SHOWN], shown[:SHOWN], strict=True)
    ]
    more = len(ids) - SHOWN
    return ", ".join(items) + (f" and {more} more" if more > 0 else "")


def _basin_dates(
    ids: Sequence[str], rows: Sequence[int], dates: pd.Series, values: pd.Series
) -> str:
    """``basin 'a' on 2001-01-03 (line 5): 1e+09`` for each offender, or ''."""
    word = getattr(rows, "name", None) or "row"
    if not len(ids):
        return ""
    items = [
        f"basin '{basin}' on {date:%Y-%m-%d} ({word} {row}): {_shown(value)}"
        for basin, row, date, value in zip(
            list(ids)[:SHOWN],
            list(rows)[:SHOWN],
            list(dates)[:SHOWN],
            list(values)[:SHOWN],
            strict=True,
        )
    ]
    more = len(ids) - SHOWN
    return ", ".join(items) + (f" and {more} more" if more > 0 else "")


def _shown(value: object) -> str:
    if value is None or (isinstance(value, float) and np.isnan(value)):
        return "empty"
    if isinstance(value, str):
        return repr(value)
    return f"{value:g}" if isinstance(value, float | np.floating) else str(value)


def _grouped_rows(keys: pd.Series, rows: Sequence[int]) -> str:
    """``'a' at rows 3, 7`` for each repeated key, or '' when there is none."""
    word = getattr(rows, "name", None) or "row"
    if not len(keys):
        return ""
    frame = pd.DataFrame({"key": np.asarray(keys, dtype=object), "row": np.asarray(rows)})
    distinct = pd.unique(frame["key"])
    shown = frame.loc[frame["key"].isin(distinct[:SHOWN])]
    grouped = shown.groupby("key", sort=False)["row"].apply(list)
    items = [f"'{key}' at {word}s {', '.join(map(str, r))}" for key, r in grouped.items()]
    more = len(distinct) - len(items)
    return f"{len(distinct)} repeated: " + ", ".join(items) + (f" and {more} more" if more else "")
