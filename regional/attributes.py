"""Basin attributes: polygons, overlays, a DEM and daily series -> one table indexed by basin_id.

:func:`compute_attributes` is the single public entry point. It is a short list of named private
steps, one per attribute family (geometry, climate, overlays, terrain); each step returns a
DataFrame indexed by ``basin_id`` and the table is assembled last. Columns the user already has
(in the basins layer) are kept as given and never recomputed.

Methods, units and references are described per attribute in ``docs/attributes.md``.
"""

from __future__ import annotations

import warnings
from collections.abc import Sequence
from dataclasses import dataclass

import geopandas as gpd
import numpy as np
import pandas as pd
import pyproj
import shapely

from regional import io
from regional.errors import InputError, InputWarning

_GEOD = pyproj.Geod(ellps="WGS84")
_WGS84 = pyproj.CRS.from_epsg(4326)

#: UNEP (1992) aridity-index classes on P/PET: (lower bound, inclusive; label), ascending.
UNEP_CLASSES: tuple[tuple[float, str], ...] = (
    (0.0, "hyper-arid"),
    (0.05, "arid"),
    (0.2, "semi-arid"),
    (0.5, "dry sub-humid"),
    (0.65, "humid"),
)
UNEP_REFERENCE = "UNEP (1992) World Atlas of Desertification"

#: Days with mean air temperature below this (deg C) count as snowfall days for ``snow_fraction``.
SNOW_THRESHOLD_C = 0.0

#: Basins whose series are widened to float64 and summed at a time (:func:`_column_sums`).
SUM_BLOCK_BASINS = 256

#: Share of a basin an overlay must cover before a partial-coverage note is written.
_FULL_COVER = 0.999

#: Computed columns in table order.
COMPUTED_COLUMNS: tuple[str, ...] = (
    "area_km2",
    "centroid_lon",
    "centroid_lat",
    "perimeter_km",
    "compactness",
    "aridity",
    "aridity_class",
    "runoff_ratio",
    "snow_fraction",
    "elevation_mean",
    "slope_mean",
)


@dataclass(frozen=True)
class Attributes:
    """Result of :func:`compute_attributes`.

    Attributes
    ----------
    table : DataFrame
        One row per basin, indexed by ``basin_id`` (str): the user's own columns first, unchanged,
        then the computed attributes that were not already columns (see ``docs/attributes.md``).
    notes : tuple of str
        What was skipped or approximated and why (for the check summary and the report).
    """

    table: pd.DataFrame
    notes: tuple[str, ...]


def compute_attributes(
    basins: gpd.GeoDataFrame,
    *,
    precip_mm: pd.DataFrame,
    pet_mm: pd.DataFrame,
    temp_c: pd.DataFrame | None = None,
    flow_mm: pd.DataFrame | None = None,
    overlays: Sequence[io.Overlay] = (),
    dem: io.Raster | None = None,
    area_crs: pyproj.CRS | str | None = None,
    climate: pd.DataFrame | None = None,
) -> Attributes:
    """Compute the attribute table of a region's basins.

    Parameters
    ----------
    basins : GeoDataFrame
        Indexed by ``basin_id`` (str, unique), with a CRS; geometries all polygons (Polygon or
        MultiPolygon) or all points (gauge or outlet locations). Point basins need an
        ``area_km2`` column. Non-geometry columns are user attributes and pass through unchanged.
    precip_mm : DataFrame, shape (days, basins)
        Daily basin-average precipitation in mm/day; index dates, columns basin_id.
    pet_mm : DataFrame, shape (days, basins)
        Daily potential evapotranspiration in mm/day, same layout.
    temp_c : DataFrame, optional
        Daily mean air temperature in deg C, same layout; enables ``snow_fraction``.
    flow_mm : DataFrame, optional
        Daily observed flow in mm/day, same layout; NaN where missing; ungauged basins may be
        absent or all NaN. Enables ``runoff_ratio``.
    overlays : sequence of regional.io.Overlay, default ()
        Polygon layers whose numeric fields are area-averaged over each basin (one column per
        field, named like the field).
    dem : regional.io.Raster, optional
        Elevation grid in metres, north-up; enables ``elevation_mean`` (m) and ``slope_mean``
        (degrees).
    area_crs : pyproj.CRS or str, optional
        Equal-area CRS of the centroids and overlay intersections; default
        :func:`equal_area_crs` of ``basins``. New sites of a fitted region are given the
        region's, so that their attributes are computed exactly as the region's were.
    climate : DataFrame, optional
        The attributes of the series computed beforehand, a block of basins at a time
        (:func:`climate_table` of each block, stacked in basin order); the series arguments
        are then not read. The table is the one computed from the whole series (each basin
        is summed on its own).

    Returns
    -------
    Attributes
        ``table`` indexed by ``basin_id`` and ``notes`` on what was skipped.

    Raises
    ------
    regional.errors.InputError
        Missing CRS, duplicate ids, empty or invalid geometry, mixed points and polygons, point
        basins without ``area_km2``, a series without a column for a basin, an overlay field
        missing or not numeric, a rotated DEM.
    """
    kind = _check_basins(basins)
    ids = list(basins.index)
    user = pd.DataFrame(basins.drop(columns=basins.geometry.name))
    notes: list[str] = []
    if climate is None:
        climate = climate_table(
            ids, precip_mm=precip_mm, pet_mm=pet_mm, temp_c=temp_c, flow_mm=flow_mm
        )
    _check_overlay_fields(overlays)
    area_crs = equal_area_crs(basins) if area_crs is None else pyproj.CRS(area_crs)
    parts = [_centroids(basins, kind, area_crs)]
    if kind == "polygon":
        parts.append(_area_perimeter_compactness(basins))
    else:
        parts.append(_area_from_column(basins))
        notes.append(
            "basins are points: perimeter_km, compactness, overlays and raster attributes skipped"
        )
    parts.extend(_climate_parts(climate.reindex(ids), ids, notes))
    if kind == "polygon":
        for overlay in overlays:
            parts.append(_overlay_means(basins, overlay, area_crs, notes))
        if dem is not None:
            parts.append(_terrain(basins, dem, notes))
        else:
            notes.append("no raster given: elevation_mean and slope_mean not computed")
    table = _assemble(user, parts, notes)
    return Attributes(table=table, notes=tuple(notes))


def aridity_class(precip_over_pet: np.ndarray | pd.Series | float) -> np.ndarray:
    """Classify an aridity index P/PET with the UNEP (1992) thresholds.

    Classes (UNEP 1992, World Atlas of Desertification): hyper-arid P/PET < 0.05; arid
    0.05 <= P/PET < 0.2; semi-arid 0.2 <= P/PET < 0.5; dry sub-humid 0.5 <= P/PET < 0.65;
    humid P/PET >= 0.65. Lower bounds are inclusive.

    Parameters
    ----------
    precip_over_pet : float or array-like
        Mean precipitation divided by mean PET (dimensionless); NaN gives ``None``.

    Returns
    -------
    ndarray of object
        Class labels, same shape as the input.
    """
    index = np.atleast_1d(np.asarray(precip_over_pet, dtype=float))
    bounds = np.array([lower for lower, _ in UNEP_CLASSES[1:]])
    labels = np.array([label for _, label in UNEP_CLASSES] + [None], dtype=object)
    position = np.searchsorted(bounds, index, side="right")
    position[~np.isfinite(index) & ~np.isposinf(index)] = len(UNEP_CLASSES)
    return labels[position].reshape(np.shape(precip_over_pet))


# ----------------------------------------------------------------------------- input checks


def _check_basins(basins: gpd.GeoDataFrame) -> str:
    """Validate the basins frame and return ``"polygon"`` or ``"point"``."""
    if not isinstance(basins, gpd.GeoDataFrame):
        raise InputError(
            f"basins: expected a GeoDataFrame indexed by basin_id, found {type(basins).__name__}; "
            "read the basins layer with regional.io first."
        )
    if basins.crs is None:
        raise InputError(
            "basins: the layer has no CRS; areas and distances need one; assign the layer's "
            "coordinate reference system in your GIS (e.g. EPSG:32633) and save it again."
        )
    duplicated = basins.index[basins.index.duplicated()].unique()
    if len(duplicated):
        raise InputError(
            f"basins: basin_id must be unique, found {len(duplicated)} duplicated id(s): "
            f"{_shortlist(duplicated)}; give every basin its own id."
        )
    geoms = basins.geometry.to_numpy()
    empty = shapely.is_missing(geoms) | shapely.is_empty(geoms)
    if empty.any():
        raise InputError(
            f"basins: basin {_shortlist(basins.index[empty])} has an empty or missing geometry; "
            "every basin needs a polygon or a point; draw the geometry or remove the basin."
        )
    types = shapely.get_type_id(geoms)
    polygon = np.isin(types, (shapely.GeometryType.POLYGON, shapely.GeometryType.MULTIPOLYGON))
    point = types == shapely.GeometryType.POINT
    other = ~(polygon | point)
    if other.any():
        found = sorted({shapely.get_type_id(g).item() for g in geoms[other]})
        raise InputError(
            f"basins: basin {_shortlist(basins.index[other])} has geometry type id(s) {found}; "
            "basins must be polygons (Polygon, MultiPolygon) or points (Point); convert them."
        )
    if polygon.any() and point.any():
        raise InputError(
            f"basins: the layer mixes {int(polygon.sum())} polygon and {int(point.sum())} point "
            f"basins (points: {_shortlist(basins.index[point])}); use one kind for the layer: "
            "all basin polygons, or all outlet points with an area_km2 column."
        )
    if polygon.any():
        invalid = ~shapely.is_valid(geoms)
        if invalid.any():
            first = np.flatnonzero(invalid)[0]
            raise InputError(
                f"basins: basin {_shortlist(basins.index[invalid])} has an invalid polygon "
                f"({shapely.is_valid_reason(geoms[first])}); polygons must not self-intersect; "
                "repair it (e.g. GIS 'fix geometries' or shapely.make_valid) and save again."
            )
        return "polygon"
    return "point"


def _align_series(
    ids: list[str],
    *,
    precip_mm: pd.DataFrame,
    pet_mm: pd.DataFrame,
    temp_c: pd.DataFrame | None,
    flow_mm: pd.DataFrame | None,
) -> dict[str, np.ndarray | None]:
    """Arrays shaped (days, basins) in the order of ``ids``, on the dates of ``precip_mm``."""
    dates = precip_mm.index if isinstance(precip_mm, pd.DataFrame) else None
    return {
        "precip": _series_matrix(precip_mm, "precip_mm", ids, dates, required=True),
        "pet": _series_matrix(pet_mm, "pet_mm", ids, dates, required=True),
        "temp": _series_matrix(temp_c, "temp_c", ids, dates, required=False),
        "flow": _series_matrix(flow_mm, "flow_mm", ids, dates, required=False),
    }


def _series_matrix(
    frame: pd.DataFrame | None,
    name: str,
    ids: list[str],
    dates: pd.Index | None,
    *,
    required: bool,
) -> np.ndarray | None:
    if frame is None:
        return None
    if not isinstance(frame, pd.DataFrame):
        raise InputError(
            f"series {name}: expected a DataFrame of dates x basin_id, found "
            f"{type(frame).__name__}; pass the wide table built from the series file."
        )
    missing = [basin for basin in ids if basin not in frame.columns]
    if required and missing:
        raise InputError(
            f"series {name}: no values for {len(missing)} basin(s) of the basins layer: "
            f"{_shortlist(missing)}; every basin needs {name}; add its rows to the series file "
            "or remove the basin from the layer."
        )
    wide = frame.reindex(columns=ids)
    if dates is not None and not wide.index.equals(dates):
        wide = wide.reindex(dates)
    if all(pd.api.types.is_float_dtype(dtype) for dtype in wide.dtypes):
        return wide.to_numpy()  # the stored float type (float32): no copy of the whole table
    try:
        return wide.to_numpy(dtype=float, na_value=np.nan)
    except (TypeError, ValueError) as error:
        raise InputError(
            f"series {name}: values must be numbers, found non-numeric entries ({error}); "
            "fix or blank them in the series file."
        ) from None


def _check_overlay_fields(overlays: Sequence[io.Overlay]) -> None:
    seen: dict[str, str] = {}
    for overlay in overlays:
        for field in overlay.fields:
            if field in seen:
                raise InputError(
                    f"overlays: field {field!r} is listed by both {seen[field]} and "
                    f"{overlay.source}; each field becomes one attribute column; rename one "
                    "field in its layer or list it in one [[overlays]] entry only."
                )
            seen[field] = overlay.source


def _shortlist(values, limit: int = 5) -> str:
    values = [str(v) for v in values]
    head = ", ".join(repr(v) for v in values[:limit])
    return head + (f" and {len(values) - limit} more" if len(values) > limit else "")


# ----------------------------------------------------------------------------- geometry


def equal_area_crs(basins: gpd.GeoDataFrame) -> pyproj.CRS:
    """Lambert azimuthal equal-area CRS centred on the region (WGS84 datum, metres)."""
    lon_min, lat_min, lon_max, lat_max = basins.geometry.to_crs(_WGS84).total_bounds
    return pyproj.CRS.from_proj4(
        f"+proj=laea +lat_0={(lat_min + lat_max) / 2:.6f} +lon_0={(lon_min + lon_max) / 2:.6f} "
        "+datum=WGS84 +units=m +no_defs"
    )


def _centroids(basins: gpd.GeoDataFrame, kind: str, area_crs: pyproj.CRS) -> pd.DataFrame:
    """Centroid in WGS84 degrees: polygon centroid taken in an equal-area CRS, or the point."""
    geometry = basins.geometry
    if kind == "polygon":
        geometry = geometry.to_crs(area_crs).centroid
    lonlat = geometry.to_crs(_WGS84)
    return pd.DataFrame(
        {"centroid_lon": lonlat.x.to_numpy(), "centroid_lat": lonlat.y.to_numpy()},
        index=basins.index,
    )


def basin_area_km2(basins: gpd.GeoDataFrame) -> pd.Series:
    """Area of each basin in km2: the layer's ``area_km2`` when it has one, else the geodesic
    area of the polygons (as :func:`compute_attributes` computes it)."""
    if "area_km2" in basins.columns:
        return pd.to_numeric(basins["area_km2"]).astype(float)
    return _area_perimeter_compactness(basins)["area_km2"]


def _area_perimeter_compactness(basins: gpd.GeoDataFrame) -> pd.DataFrame:
    """Geodesic area and exterior perimeter on the WGS84 ellipsoid, and Gravelius' coefficient.

    Area and perimeter come from :meth:`pyproj.Geod.geometry_area_perimeter` (Karney 2013
    algorithms) on the polygons transformed to WGS84 longitude/latitude, exteriors oriented
    counter-clockwise so holes are subtracted. Compactness is Gravelius' coefficient
    ``Kc = P / (2 sqrt(pi A))`` (Gravelius 1914): 1 for a circle, larger for elongated basins.
    """
    lonlat = shapely.orient_polygons(basins.geometry.to_crs(_WGS84).to_numpy(), exterior_cw=False)
    area_m2 = np.empty(len(lonlat))
    perimeter_m = np.empty(len(lonlat))
    for i, geom in enumerate(lonlat):  # one call per basin, not per time step
        area_m2[i], perimeter_m[i] = _exterior_area_perimeter(geom)
    return pd.DataFrame(
        {
            "area_km2": area_m2 / 1e6,
            "perimeter_km": perimeter_m / 1e3,
            "compactness": perimeter_m / (2.0 * np.sqrt(np.pi * area_m2)),
        },
        index=basins.index,
    )


def _exterior_area_perimeter(geom) -> tuple[float, float]:
    """Geodesic area (holes subtracted) and exterior-ring perimeter of a (multi)polygon, in m."""
    parts = geom.geoms if hasattr(geom, "geoms") else (geom,)
    area = sum(_GEOD.geometry_area_perimeter(part)[0] for part in parts)
    perimeter = sum(_GEOD.geometry_area_perimeter(part.exterior)[1] for part in parts)
    return abs(area), perimeter


def _area_from_column(basins: gpd.GeoDataFrame) -> pd.DataFrame:
    """Point basins: the area must be a user column; checked here so the message is clear."""
    if "area_km2" not in basins.columns:
        raise InputError(
            "basins: the basins are points (outlets or gauges) and the layer has no area_km2 "
            "column; the area of a point basin cannot be computed; add an area_km2 column "
            "(km2), or name the area column with [basins] area in region.toml."
        )
    return pd.DataFrame(index=basins.index)


# ----------------------------------------------------------------------------- climate


def climate_table(
    ids: list[str],
    *,
    precip_mm: pd.DataFrame,
    pet_mm: pd.DataFrame,
    temp_c: pd.DataFrame | None = None,
    flow_mm: pd.DataFrame | None = None,
) -> pd.DataFrame:
    """The attributes of some basins' daily series, each basin summed on its own.

    Parameters
    ----------
    ids : list of str
        The basins, in the order of the rows returned.
    precip_mm, pet_mm, temp_c, flow_mm
        As for :func:`compute_attributes`.

    Returns
    -------
    DataFrame
        Indexed by ``ids``: ``aridity``, ``aridity_class``, ``runoff_ratio`` (when flow is
        given), ``snow_fraction`` (when temperature is given), and per attribute a flag of
        the basins without a day to compute it (``_no_climate``, ``_no_flow``,
        ``_no_temp``). A basin's values do not depend on the other basins given with it, so
        a region's table may be computed a block of basins at a time and stacked.
    """
    series = _align_series(ids, precip_mm=precip_mm, pet_mm=pet_mm, temp_c=temp_c, flow_mm=flow_mm)
    parts = [_aridity(series["precip"], series["pet"])]
    if series["flow"] is not None:
        parts.append(_runoff_ratio(series["precip"], series["flow"]))
    if series["temp"] is not None:
        parts.append(_snow_fraction(series["precip"], series["temp"]))
    return pd.concat(parts, axis=1).set_axis(pd.Index(ids))


def _climate_parts(table: pd.DataFrame, ids: list[str], notes: list[str]) -> list[pd.DataFrame]:
    """The attribute columns of a :func:`climate_table` and the notes on what is missing."""
    table = table.set_axis(pd.Index(ids))
    shown = np.asarray(ids)
    empty = table["_no_climate"].to_numpy(dtype=bool)
    if empty.any():
        notes.append(
            f"aridity NaN for {int(empty.sum())} basin(s) without a day of both precipitation "
            f"and PET: {_shortlist(shown[empty])}"
        )
    notes.append(f"aridity_class: thresholds on P/PET from {UNEP_REFERENCE}")
    parts = [table[["aridity", "aridity_class"]]]
    parts.append(
        _optional(
            table,
            "runoff_ratio",
            "_no_flow",
            skipped="runoff_ratio skipped: no observed flow given",
            lacking=lambda m: (
                f"runoff_ratio NaN for {int(m.sum())} basin(s) without observed flow"
            ),
            notes=notes,
        )
    )
    parts.append(
        _optional(
            table,
            "snow_fraction",
            "_no_temp",
            skipped="snow_fraction skipped: no temperature series given",
            lacking=lambda m: (
                f"snow_fraction NaN for {int(m.sum())} basin(s) without temperature: "
                f"{_shortlist(shown[m])}"
            ),
            notes=notes,
        )
    )
    return parts


def _optional(table, name: str, flag: str, *, skipped: str, lacking, notes: list[str]):
    """An attribute that needs an optional series: its column, or none and a note saying it
    was skipped; a note on the basins without a day to compute it (``lacking(mask)``)."""
    if name not in table.columns:
        notes.append(skipped)
        return pd.DataFrame(index=table.index)
    without = table[flag].to_numpy(dtype=bool)
    if without.any():
        notes.append(lacking(without))
    return table[[name]]


def _aridity(precip: np.ndarray, pet: np.ndarray) -> pd.DataFrame:
    """Aridity PET/P (Budyko's dryness index) over the whole record and its UNEP (1992) class."""
    valid = np.isfinite(precip) & np.isfinite(pet)
    mean_p = _masked_mean(precip, valid)
    mean_pet = _masked_mean(pet, valid)
    with np.errstate(divide="ignore", invalid="ignore"):
        aridity = mean_pet / mean_p
        humidity = mean_p / mean_pet
    return pd.DataFrame(
        {
            "aridity": aridity,
            "aridity_class": aridity_class(humidity),
            "_no_climate": ~valid.any(axis=0),
        }
    )


def _runoff_ratio(precip: np.ndarray, flow: np.ndarray) -> pd.DataFrame:
    """Mean observed flow over mean precipitation on the days with observed flow."""
    valid = np.isfinite(flow) & np.isfinite(precip)
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = _masked_mean(flow, valid) / _masked_mean(precip, valid)
    return pd.DataFrame({"runoff_ratio": ratio, "_no_flow": ~valid.any(axis=0)})


def _snow_fraction(precip: np.ndarray, temp: np.ndarray) -> pd.DataFrame:
    """Share of precipitation falling on days with mean temperature below 0 deg C."""
    valid = np.isfinite(precip) & np.isfinite(temp)
    total = _column_sums(np.where(valid, precip, 0.0))
    cold = _column_sums(np.where(valid & (temp < SNOW_THRESHOLD_C), precip, 0.0))
    with np.errstate(divide="ignore", invalid="ignore"):
        fraction = np.where(total > 0, cold / total, np.nan)
    return pd.DataFrame({"snow_fraction": fraction, "_no_temp": ~valid.any(axis=0)})


def _masked_mean(values: np.ndarray, valid: np.ndarray) -> np.ndarray:
    count = valid.sum(axis=0)
    total = _column_sums(np.where(valid, values, 0.0))
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(count > 0, total / count, np.nan)


def _column_sums(values: np.ndarray, *, block: int = SUM_BLOCK_BASINS) -> np.ndarray:
    """Sum of each column (basin), each summed on its own in contiguous memory.

    A basin's sum then does not depend on how many other basins share the array or on its
    memory layout, so a basin alone (a new site of a fitted region) gets the bits it had among
    the region's basins.
    """
    values = np.asarray(values)
    sums = np.empty(values.shape[1])
    for first in range(0, values.shape[1], block):  # float64 copies of a block only
        part = slice(first, first + block)
        sums[part] = np.ascontiguousarray(values[:, part].T, dtype=float).sum(axis=1)
    return sums


# ----------------------------------------------------------------------------- overlays


def _overlay_means(
    basins: gpd.GeoDataFrame, overlay: io.Overlay, area_crs: pyproj.CRS, notes: list[str]
) -> pd.DataFrame:
    """Area-weighted mean of each overlay field over each basin.

    Weights are the exact areas of the basin-polygon intersections in an equal-area CRS. Where a
    basin is only partly covered (or a field is blank on part of it) the mean is taken over the
    covered part and a note gives the covered share.
    """
    pieces = _overlay_geometries(overlay, area_crs)
    basin_geoms = basins.geometry.to_crs(area_crs).to_numpy()
    basin_area = shapely.area(basin_geoms)
    tree = shapely.STRtree(pieces)
    b_idx, o_idx = tree.query(basin_geoms, predicate="intersects")
    weight = shapely.area(shapely.intersection(basin_geoms[b_idx], pieces[o_idx]))
    n = len(basin_geoms)
    covered = np.bincount(b_idx, weights=weight, minlength=n) / basin_area
    _note_overlap(overlay, basins.index, covered)
    columns, shares = {}, {}
    for field in overlay.fields:
        values = _overlay_field(overlay, field)[o_idx]
        ok = np.isfinite(values)
        den = np.bincount(b_idx, weights=np.where(ok, weight, 0.0), minlength=n)
        num = np.bincount(b_idx, weights=np.where(ok, weight * values, 0.0), minlength=n)
        with np.errstate(divide="ignore", invalid="ignore"):
            columns[field] = np.where(den > 0, num / den, np.nan)
        shares[field] = np.minimum(den / basin_area, 1.0)
    _note_coverage(overlay, basins.index, shares, notes)
    return pd.DataFrame(columns, index=basins.index)


def _overlay_geometries(overlay: io.Overlay, area_crs: pyproj.CRS) -> np.ndarray:
    frame = overlay.frame
    if frame.crs is None:
        raise InputError(
            f"overlay {overlay.source}: the layer has no CRS; area weights need one; assign the "
            "layer's coordinate reference system in your GIS and save it again."
        )
    geoms = frame.geometry.to_crs(area_crs).to_numpy()
    usable = ~(shapely.is_missing(geoms) | shapely.is_empty(geoms))
    invalid = usable & ~shapely.is_valid(geoms)
    if invalid.any():
        warnings.warn(
            f"overlay {overlay.source}: {int(invalid.sum())} invalid polygon(s) repaired with "
            "shapely.make_valid before intersecting (the file is not changed); fix them in the "
            "layer to silence this warning.",
            InputWarning,
            stacklevel=4,
        )
        geoms = geoms.copy()
        geoms[invalid] = shapely.make_valid(geoms[invalid])
    geoms = geoms.copy()
    geoms[~usable] = shapely.Polygon()
    return geoms


def _overlay_field(overlay: io.Overlay, field: str) -> np.ndarray:
    frame = overlay.frame
    if field not in frame.columns:
        raise InputError(
            f"overlay {overlay.source}: field {field!r} not found (fields present: "
            f"{_shortlist([c for c in frame.columns if c != frame.geometry.name], 12)}); "
            "correct the name in [[overlays]] fields."
        )
    try:
        return frame[field].to_numpy(dtype=float, na_value=np.nan)
    except (TypeError, ValueError):
        example = frame[field].dropna().iloc[0] if frame[field].notna().any() else None
        raise InputError(
            f"overlay {overlay.source}: field {field!r} must be numeric to be area-averaged, "
            f"found e.g. {example!r}; list only numeric fields in [[overlays]] fields."
        ) from None


def _note_overlap(overlay: io.Overlay, ids: pd.Index, covered: np.ndarray) -> None:
    over = covered > 1.0 + 1e-6
    if over.any():
        warnings.warn(
            f"overlay {overlay.source}: polygons overlap inside {int(over.sum())} basin(s) "
            f"({_shortlist(ids[over])}: up to {covered.max():.0%} covered), so overlapping parts "
            "count more than once in the area weights; dissolve or clean the overlaps.",
            InputWarning,
            stacklevel=4,
        )


def _note_coverage(
    overlay: io.Overlay, ids: pd.Index, shares: dict[str, np.ndarray], notes: list[str]
) -> None:
    """One note per group of fields with the same partly covered basins and shares."""
    groups: dict[tuple[int, str], list[str]] = {}
    for field, share in shares.items():
        partial = share < _FULL_COVER
        if partial.any():
            listed = ", ".join(
                f"{basin} ({value:.1%})"
                for basin, value in zip(ids[partial], share[partial], strict=True)
            )
            groups.setdefault((int(partial.sum()), listed), []).append(field)
    for (count, listed), fields in groups.items():
        notes.append(
            f"overlay {overlay.source} field(s) {', '.join(fields)}: {count} basin(s) not fully "
            f"covered, mean taken over the covered part (covered share): {listed}"
        )


# ----------------------------------------------------------------------------- terrain


def _terrain(basins: gpd.GeoDataFrame, dem: io.Raster, notes: list[str]) -> pd.DataFrame:
    """Mean elevation (m) and mean slope (degrees) of the DEM cells centred inside each basin."""
    crs, transform = _check_dem(dem)
    elevation = np.asarray(dem.values, dtype=float)
    slope = _slope_degrees(elevation, transform, crs)
    geoms = basins.geometry.to_crs(crs).to_numpy()
    elevation_mean, slope_mean, n_cells = _zonal_means(geoms, transform, elevation, slope)
    _note_terrain(basins.index, n_cells, notes)
    return pd.DataFrame(
        {"elevation_mean": elevation_mean, "slope_mean": slope_mean}, index=basins.index
    )


def _check_dem(dem: io.Raster) -> tuple[pyproj.CRS, object]:
    if dem.crs is None:
        raise InputError(
            f"raster {dem.path}: the grid has no CRS; cell sizes in metres need one; assign it "
            "(e.g. gdal_edit.py -a_srs EPSG:32633) and run again."
        )
    transform = dem.transform
    if transform.b != 0 or transform.d != 0:
        raise InputError(
            f"raster {dem.path}: the grid is rotated (transform terms b={transform.b}, "
            f"d={transform.d}); only north-up grids are supported; warp it to a north-up grid "
            "(e.g. gdalwarp) first."
        )
    if min(np.shape(dem.values)) < 2:
        raise InputError(
            f"raster {dem.path}: the grid has shape {np.shape(dem.values)}; slope needs at least "
            "2 rows and 2 columns; use a DEM covering the basins."
        )
    return pyproj.CRS.from_user_input(dem.crs), transform


def _slope_degrees(elevation: np.ndarray, transform, crs: pyproj.CRS) -> np.ndarray:
    """Slope angle in degrees from the central-difference gradient of the elevation (m).

    ``np.gradient`` takes central differences inside the grid and one-sided ones on its edges;
    derivatives are divided by the cell size in metres (per row on geographic grids).
    """
    dx_m, dy_m = _cell_size_m(transform, crs, elevation.shape[0])
    dz_row, dz_col = np.gradient(elevation)
    dzdx = dz_col / dx_m[:, None]
    dzdy = dz_row / dy_m[:, None]
    return np.degrees(np.arctan(np.hypot(dzdx, dzdy)))


def _cell_size_m(transform, crs: pyproj.CRS, n_rows: int) -> tuple[np.ndarray, np.ndarray]:
    """East-west and north-south cell size in metres for each row, shape (rows,).

    Projected grids: the cell size times the unit's metre factor. Geographic grids: degrees
    converted at each row's centre latitude phi with the ellipsoid's radii of curvature,
    dx = dlon N(phi) cos(phi), dy = dlat M(phi), N = a / W, M = a (1 - e2) / W^3,
    W = sqrt(1 - e2 sin^2 phi) (standard geodesy, e.g. Torge and Mueller 2012, Geodesy).
    """
    width, height = abs(transform.a), abs(transform.e)
    if not crs.is_geographic:
        factor = crs.axis_info[0].unit_conversion_factor
        return np.full(n_rows, width * factor), np.full(n_rows, height * factor)
    lat = np.radians(transform.f + transform.e * (np.arange(n_rows) + 0.5))
    a = crs.ellipsoid.semi_major_metre
    inverse_flattening = crs.ellipsoid.inverse_flattening
    flattening = 1.0 / inverse_flattening if inverse_flattening else 0.0
    e2 = flattening * (2.0 - flattening)
    w = np.sqrt(1.0 - e2 * np.sin(lat) ** 2)
    dx = np.radians(width) * a / w * np.cos(lat)
    dy = np.radians(height) * a * (1.0 - e2) / w**3
    return dx, dy


def _zonal_means(
    geoms: np.ndarray, transform, elevation: np.ndarray, slope: np.ndarray
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Means over the cells whose centres lie inside each geometry.

    A basin smaller than a cell (no centre inside) takes the cell under its centroid; the count
    returned is then 0 so the caller can say so.
    """
    n_rows, n_cols = elevation.shape
    elevation_mean = np.full(len(geoms), np.nan)
    slope_mean = np.full(len(geoms), np.nan)
    n_cells = np.zeros(len(geoms), dtype=int)
    for i, geom in enumerate(geoms):  # one pass per basin over its own window
        rows, cols = _window(geom, transform, n_rows, n_cols)
        if rows.size and cols.size:
            xs = transform.c + transform.a * (cols + 0.5)
            ys = transform.f + transform.e * (rows + 0.5)
            inside = shapely.contains_xy(geom, xs[None, :], ys[:, None])
            sub_e = elevation[np.ix_(rows, cols)][inside]
            sub_s = slope[np.ix_(rows, cols)][inside]
            n_cells[i] = inside.sum()
        if n_cells[i] == 0:
            x, y = shapely.get_coordinates(shapely.point_on_surface(geom))[0]
            col, row = _fractional_cell(transform, x, y)
            row, col = int(np.floor(row)), int(np.floor(col))
            if not (0 <= row < n_rows and 0 <= col < n_cols):
                n_cells[i] = -1
                continue
            sub_e, sub_s = elevation[row : row + 1, col], slope[row : row + 1, col]
        if np.isfinite(sub_e).any():
            elevation_mean[i] = np.nanmean(sub_e)
        if np.isfinite(sub_s).any():
            slope_mean[i] = np.nanmean(sub_s)
    return elevation_mean, slope_mean, n_cells


def _fractional_cell(transform, x: float, y: float) -> tuple[float, float]:
    """(column, row) in cell units of a map point on a north-up grid."""
    return (x - transform.c) / transform.a, (y - transform.f) / transform.e


def _window(geom, transform, n_rows: int, n_cols: int) -> tuple[np.ndarray, np.ndarray]:
    """Row and column indices of the grid cells overlapping the geometry's bounding box."""
    x0, y0, x1, y1 = shapely.bounds(geom)
    c0, r0 = _fractional_cell(transform, x0, y1)
    c1, r1 = _fractional_cell(transform, x1, y0)
    r_lo, r_hi = sorted((r0, r1))
    c_lo, c_hi = sorted((c0, c1))
    rows = np.arange(max(int(np.floor(r_lo)), 0), min(int(np.ceil(r_hi)), n_rows))
    cols = np.arange(max(int(np.floor(c_lo)), 0), min(int(np.ceil(c_hi)), n_cols))
    return rows, cols


def _note_terrain(ids: pd.Index, n_cells: np.ndarray, notes: list[str]) -> None:
    outside = n_cells < 0
    small = n_cells == 0
    if outside.any():
        warnings.warn(
            f"raster: {int(outside.sum())} basin(s) lie outside the DEM "
            f"({_shortlist(ids[outside])}): elevation_mean and slope_mean are NaN for them; "
            "use a DEM covering every basin.",
            InputWarning,
            stacklevel=4,
        )
        notes.append(
            f"elevation_mean and slope_mean NaN for {int(outside.sum())} basin(s) outside the "
            f"DEM: {_shortlist(ids[outside])}"
        )
    if small.any():
        notes.append(
            f"{int(small.sum())} basin(s) smaller than a DEM cell take the cell under an inner "
            f"point: {_shortlist(ids[small])}"
        )


# ----------------------------------------------------------------------------- assembly


def _assemble(user: pd.DataFrame, parts: list[pd.DataFrame], notes: list[str]) -> pd.DataFrame:
    """User columns first and unchanged, then computed columns the user does not have."""
    computed = pd.concat([part.set_axis(user.index) for part in parts], axis=1)
    kept = [column for column in computed.columns if column in user.columns]
    if kept:
        notes.append(f"taken from the basins layer as given, not computed: {', '.join(kept)}")
    order = [c for c in COMPUTED_COLUMNS if c in computed.columns]
    order += [c for c in computed.columns if c not in order]
    new = computed[[c for c in order if c not in user.columns]]
    table = pd.concat([user, new], axis=1)
    table.index.name = "basin_id"
    return table
