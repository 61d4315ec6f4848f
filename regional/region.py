"""A validated region: basins, attributes, daily forcing and observed flow on common dates.

:func:`load_region` is the single entry point: settings -> readers (:mod:`regional.io`) ->
checks (:mod:`regional.checks`) -> wide daily tables -> attributes
(:mod:`regional.attributes`). It either returns a :class:`Region` or raises one
:class:`~regional.errors.InputError` naming the file, layer or column, basin and row at fault.
:func:`describe_region` summarises a region for ``regional check``.
"""

from __future__ import annotations

import difflib
import warnings
from dataclasses import dataclass, replace
from pathlib import Path

import geopandas as gpd
import numpy as np
import pandas as pd

from regional import checks, io
from regional.attributes import compute_attributes
from regional.config import Settings, load_settings
from regional.errors import InputError, InputWarning

#: mm/day of runoff from 1 m3/s over 1 km2: 86 400 s/day * 1 m3/s / 1e6 m2 * 1000 mm/m.
MM_PER_DAY_PER_M3S_KM2 = 86.4


@dataclass(frozen=True, eq=False)
class Region:
    """Everything a run needs about a region, validated.

    Daily tables are DataFrames shaped (days, basins): index ``dates`` (named ``date``), columns
    ``basin_id`` in the order of ``basins``.

    Attributes
    ----------
    settings : Settings
        The parsed ``region.toml``.
    basins : GeoDataFrame
        Indexed by ``basin_id`` (str), the layer's CRS kept; polygons or points.
    attributes : DataFrame
        Attribute table indexed by ``basin_id`` (user columns, then computed ones).
    dates : DatetimeIndex
        Daily and continuous: the period covered by every basin's forcing.
    precip_mm, pet_mm : DataFrame
        Precipitation and potential evapotranspiration in mm/day (no missing values).
    temp_c : DataFrame or None
        Mean air temperature in deg C when given.
    flow_mm : DataFrame
        Observed flow in mm/day (converted from m3/s with the area when given so), NaN where
        missing; all NaN for ungauged basins.
    gauged, ungauged : tuple of str
        Basins with / without observed flow in the calibration period, in basin order.
    is_point : bool
        Basins were given as points (outlets) carrying their area.
    notes : tuple of str
        What was skipped, trimmed or approximated.
    warnings : tuple of str
        The :class:`~regional.errors.InputWarning` messages raised while loading.
    """

    settings: Settings
    basins: gpd.GeoDataFrame
    attributes: pd.DataFrame
    dates: pd.DatetimeIndex
    precip_mm: pd.DataFrame
    pet_mm: pd.DataFrame
    temp_c: pd.DataFrame | None
    flow_mm: pd.DataFrame
    gauged: tuple[str, ...]
    ungauged: tuple[str, ...]
    is_point: bool
    notes: tuple[str, ...]
    warnings: tuple[str, ...]

    @property
    def calibration(self) -> tuple[pd.Timestamp, pd.Timestamp]:
        """The calibration period: ``[model] calibration``, or the whole common record."""
        period = self.settings.model.calibration
        return period if period is not None else (self.dates[0], self.dates[-1])

    def summary(self) -> RegionSummary:
        """Counts, record lengths and attribute ranges (see :func:`describe_region`)."""
        return describe_region(self)


@dataclass(frozen=True, eq=False)
class RegionSummary:
    """What ``regional check`` prints.

    Attributes
    ----------
    name : str
        ``[region] name``.
    n_basins, n_gauged, n_ungauged : int
        Basin counts.
    geometry : str
        ``"polygons"`` or ``"points"``.
    period : (Timestamp, Timestamp)
        The common forcing period.
    calibration, validation : (Timestamp, Timestamp) or None
        The periods in use.
    records : DataFrame
        Per basin (index ``basin_id``): ``status`` (gauged/ungauged), ``first_flow``,
        ``last_flow``, ``flow_days``, ``flow_years`` (observed days / 365.25), ``gap_days``
        (missing days inside the flow record), ``calibration_days``.
    attribute_ranges : DataFrame
        Per numeric attribute (index): ``min``, ``median``, ``max``, ``missing`` (count).
    notes, warnings : tuple of str
        From loading.
    """

    name: str
    n_basins: int
    n_gauged: int
    n_ungauged: int
    geometry: str
    period: tuple[pd.Timestamp, pd.Timestamp]
    calibration: tuple[pd.Timestamp, pd.Timestamp]
    validation: tuple[pd.Timestamp, pd.Timestamp] | None
    records: pd.DataFrame
    attribute_ranges: pd.DataFrame
    notes: tuple[str, ...]
    warnings: tuple[str, ...]


def load_region(path: str | Path | Settings) -> Region:
    """Read, check and assemble a region.

    Parameters
    ----------
    path : str, Path or Settings
        The region folder (holding ``region.toml``), the TOML file, or settings already loaded.

    Returns
    -------
    Region
        Validated basins, attributes and daily tables on the common forcing period.

    Raises
    ------
    InputError
        Any problem with the settings or the inputs, with the file, layer or column, basin and
        row at fault and the fix.

    Warns
    -----
    InputWarning
        Gaps in observed flow, short calibration records, attributes with missing values. The
        messages are also kept in ``Region.warnings``.
    """
    settings = path if isinstance(path, Settings) else load_settings(path)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        region = _build(settings)
    messages = []
    for record in caught:
        if issubclass(record.category, InputWarning):
            messages.append(str(record.message))
            warnings.warn(str(record.message), InputWarning, stacklevel=2)
        else:
            warnings.warn_explicit(record.message, record.category, record.filename, record.lineno)
    return replace(region, warnings=tuple(messages))


def describe_region(region: Region) -> RegionSummary:
    """Summarise a region: counts, record length per basin, attribute ranges, notes, warnings."""
    return RegionSummary(
        name=region.settings.region.name,
        n_basins=len(region.basins),
        n_gauged=len(region.gauged),
        n_ungauged=len(region.ungauged),
        geometry="points" if region.is_point else "polygons",
        period=(region.dates[0], region.dates[-1]),
        calibration=region.calibration,
        validation=region.settings.model.validation,
        records=_records(region),
        attribute_ranges=_attribute_ranges(region.attributes),
        notes=region.notes,
        warnings=region.warnings,
    )


# --------------------------------------------------------------------------------------------
# Steps of load_region
# --------------------------------------------------------------------------------------------


def _build(settings: Settings) -> Region:
    notes: list[str] = []
    basins, is_point = _basins(settings)
    overlays, dem = _overlays(settings), _raster(settings)
    long, series_source = _series(settings, basins.index)
    dates = _common_dates(long, series_source, notes)
    tables = _pivot(long, dates, basins.index, settings)
    flow_mm = _flow_mm(tables.pop("flow"), basins, tables, settings)
    calibration = _check_periods(settings, dates, notes)
    gauged = _gauged(
        flow_mm, calibration, f"{series_source}, column '{settings.series.flow_column}'"
    )
    checks.warn_flow_gaps(
        flow_mm, source=f"{series_source}, column '{settings.series.flow_column}'"
    )
    attributes = compute_attributes(
        basins,
        precip_mm=tables["precip"],
        pet_mm=tables["pet"],
        temp_c=tables.get("temp"),
        flow_mm=flow_mm,
        overlays=overlays,
        dem=dem,
    )
    _check_attribute_choice(settings, attributes.table)
    _check_candidates(settings, basins.index, gauged)
    ungauged = tuple(basin for basin in basins.index if basin not in set(gauged))
    return Region(
        settings=settings,
        basins=basins,
        attributes=attributes.table,
        dates=dates,
        precip_mm=tables["precip"],
        pet_mm=tables["pet"],
        temp_c=tables.get("temp"),
        flow_mm=flow_mm,
        gauged=gauged,
        ungauged=ungauged,
        is_point=is_point,
        notes=tuple(notes) + tuple(attributes.notes),
        warnings=(),
    )


def _basins(settings: Settings) -> tuple[gpd.GeoDataFrame, bool]:
    spec = settings.basins
    basins = io.read_basins(spec.path, spec.layer, id_field=spec.id, area_field=spec.area)
    source = f"basins {spec.path}" + (f" (layer '{spec.layer}')" if spec.layer else "")
    is_point = checks.check_basins(
        basins, source=source, flow_in_m3s=settings.series.flow_m3s is not None
    )
    if "area_km2" in basins.columns:
        basins = basins.assign(area_km2=pd.to_numeric(basins["area_km2"]).astype(float))
    return basins, is_point


def _overlays(settings: Settings) -> tuple[io.Overlay, ...]:
    overlays = []
    for spec in settings.overlays:
        overlay = io.read_overlay(spec.path, spec.layer, fields=spec.fields)
        checks.check_overlay(overlay)
        overlays.append(overlay)
    return tuple(overlays)


def _raster(settings: Settings) -> io.Raster | None:
    if settings.raster is None:
        return None
    raster = io.read_raster(settings.raster.path)
    checks.check_raster(raster)
    return raster


def _series(settings: Settings, basin_ids: pd.Index) -> tuple[pd.DataFrame, str]:
    spec = settings.series
    forcing = [spec.precip, spec.pet] + ([spec.temp] if spec.temp else [])
    raw = io.read_series(
        spec.path,
        id_column=spec.id,
        date_column=spec.date,
        value_columns=[*forcing, spec.flow_column],
        layer=spec.layer,
    )
    source = f"series {spec.path}" + (f" (table '{spec.layer}')" if spec.layer else "")
    long = checks.check_series(
        raw,
        source=source,
        id_column=spec.id,
        date_column=spec.date,
        forcing_columns=forcing,
        flow_column=spec.flow_column,
        basin_ids=list(basin_ids),
    )
    names = {spec.precip: "precip", spec.pet: "pet", spec.flow_column: "flow"}
    if spec.temp:
        names[spec.temp] = "temp"
    return long.rename(columns=names), source


def _common_dates(long: pd.DataFrame, source: str, notes: list[str]) -> pd.DatetimeIndex:
    grouped = long.groupby("basin_id", sort=False)["date"]
    first, last = grouped.min(), grouped.max()
    start, end = checks.check_common_period(first, last, source=source)
    trimmed = int(((first < start) | (last > end)).sum())
    if trimmed:
        notes.append(
            f"forcing of {trimmed} basins trimmed to the period common to all basins, "
            f"{start:%Y-%m-%d}..{end:%Y-%m-%d}"
        )
    return pd.date_range(start, end, freq="D", name="date")


def _pivot(
    long: pd.DataFrame, dates: pd.DatetimeIndex, order: pd.Index, settings: Settings
) -> dict[str, pd.DataFrame]:
    """Long records -> one (days, basins) table per variable, by direct placement (one pass)."""
    day = (long["date"].to_numpy() - dates[0].to_datetime64()) // np.timedelta64(1, "D")
    column = order.get_indexer(long["basin_id"])
    inside = (day >= 0) & (day < len(dates))
    day, column = day[inside], column[inside]
    variables = ["precip", "pet", "flow"] + (["temp"] if settings.series.temp else [])
    columns = pd.Index(order, name="basin_id")
    tables = {}
    for name in variables:
        grid = np.full((len(dates), len(order)), np.nan)
        grid[day, column] = long[name].to_numpy()[inside]
        tables[name] = pd.DataFrame(grid, index=dates, columns=columns)
    return tables


def _flow_mm(
    flow: pd.DataFrame,
    basins: gpd.GeoDataFrame,
    tables: dict[str, pd.DataFrame],
    settings: Settings,
) -> pd.DataFrame:
    """Observed flow in mm/day: as given, or from m3/s with the basin area (86.4 / area_km2)."""
    if settings.series.flow_m3s is None:
        return flow
    if "area_km2" in basins.columns:
        area_km2 = basins["area_km2"]
    else:
        area_km2 = compute_attributes(
            basins, precip_mm=tables["precip"], pet_mm=tables["pet"]
        ).table["area_km2"]
    return flow_m3s_to_mm(flow, area_km2)


def flow_m3s_to_mm(flow_m3s: pd.DataFrame, area_km2: pd.Series) -> pd.DataFrame:
    """Convert flow in m3/s to mm/day over the basin area.

    Parameters
    ----------
    flow_m3s : DataFrame, shape (days, basins)
        Flow in m3/s; columns basin_id.
    area_km2 : Series
        Basin area in km2 indexed by basin_id.

    Returns
    -------
    DataFrame
        Flow in mm/day: ``flow_m3s * 86.4 / area_km2`` (1 m3/s over 86.4 km2 is 1 mm/day).
    """
    area = area_km2.reindex(flow_m3s.columns).to_numpy(dtype=float)
    return flow_m3s * (MM_PER_DAY_PER_M3S_KM2 / area)


def _check_periods(
    settings: Settings, dates: pd.DatetimeIndex, notes: list[str]
) -> tuple[pd.Timestamp, pd.Timestamp]:
    model = settings.model
    periods = {"calibration": model.calibration, "validation": model.validation}
    checks.check_periods(periods, start=dates[0], end=dates[-1], source=str(settings.path))
    calibration = model.calibration or (dates[0], dates[-1])
    if model.calibration is None:
        notes.append(
            f"no [model] calibration period given: the whole record "
            f"{dates[0]:%Y-%m-%d}..{dates[-1]:%Y-%m-%d} is used"
        )
    lead = (calibration[0] - dates[0]).days
    if model.initial_storage_mm is None and lead < model.warmup_days:
        notes.append(
            f"only {lead} days of forcing before the calibration start, fewer than "
            f"warmup_days = {model.warmup_days}"
        )
    return calibration


def _gauged(
    flow_mm: pd.DataFrame, calibration: tuple[pd.Timestamp, pd.Timestamp], source: str
) -> tuple[str, ...]:
    observed = flow_mm.loc[calibration[0] : calibration[1]].notna().sum(axis=0)
    checks.check_gauged(observed, source=source, period=calibration)
    return tuple(observed.index[observed.to_numpy() > 0])


def _check_attribute_choice(settings: Settings, table: pd.DataFrame) -> None:
    chosen = settings.transfer.attributes
    numeric = [name for name in table.columns if _is_numeric(table[name])]
    if chosen is not None:
        for name in chosen:
            if name not in table.columns or name not in numeric:
                near = difflib.get_close_matches(name, numeric, n=1)
                hint = f"did you mean '{near[0]}'? " if near else ""
                what = "not numeric" if name in table.columns else "not an attribute"
                raise InputError(
                    f"key 'attributes' in [transfer] of {settings.path}: '{name}' is {what}; "
                    f"transfer attributes must be numeric attribute columns; numeric "
                    f"attributes: {', '.join(numeric)}. Fix: {hint}list only these names."
                )
    in_use = list(chosen) if chosen is not None else numeric
    missing = table[in_use].isna().sum()
    missing = missing[missing > 0]
    if len(missing):
        listing = ", ".join(f"'{name}' ({count} basins)" for name, count in missing.items())
        warnings.warn(
            f"attributes with missing values: {listing}; basins missing a transfer attribute "
            "cannot be predicted by regression or similarity. Fix: fill the values, or drop "
            "the attribute from [transfer] attributes.",
            InputWarning,
            stacklevel=2,
        )


def _check_candidates(settings: Settings, basin_ids: pd.Index, gauged: tuple[str, ...]) -> None:
    candidates = settings.screening.candidates
    if candidates is None:
        return
    unknown = [basin for basin in candidates if basin not in basin_ids]
    already = [basin for basin in candidates if basin in set(gauged)]
    if unknown or already:
        problem = f"unknown basin ids {unknown}" if unknown else f"basins already gauged {already}"
        raise InputError(
            f"key 'candidates' in [screening] of {settings.path}: candidates must be ungauged "
            f"basins of the basins layer; found {problem}. Fix: list ungauged basin ids (as "
            "quoted text), or leave the key out to screen every ungauged basin."
        )


def _is_numeric(values: pd.Series) -> bool:
    return pd.api.types.is_numeric_dtype(values) and not pd.api.types.is_bool_dtype(values)


# --------------------------------------------------------------------------------------------
# Steps of describe_region
# --------------------------------------------------------------------------------------------


def _records(region: Region) -> pd.DataFrame:
    flow = region.flow_mm
    valid = flow.notna()
    counts = valid.sum(axis=0)
    first = valid.idxmax(axis=0).where(counts > 0)
    last = valid.iloc[::-1].idxmax(axis=0).where(counts > 0)
    start, end = region.calibration
    gauged = set(region.gauged)
    return pd.DataFrame(
        {
            "status": ["gauged" if basin in gauged else "ungauged" for basin in flow.columns],
            "first_flow": first,
            "last_flow": last,
            "flow_days": counts.astype(int),
            "flow_years": (counts / 365.25).round(1),
            "gap_days": checks.flow_gap_days(flow).astype(int),
            "calibration_days": valid.loc[start:end].sum(axis=0).astype(int),
        },
        index=pd.Index(flow.columns, name="basin_id"),
    )


def _attribute_ranges(table: pd.DataFrame) -> pd.DataFrame:
    numeric = table[[name for name in table.columns if _is_numeric(table[name])]]
    return pd.DataFrame(
        {
            "min": numeric.min(),
            "median": numeric.median(),
            "max": numeric.max(),
            "missing": numeric.isna().sum().astype(int),
        }
    )
