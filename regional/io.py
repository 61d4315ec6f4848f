"""Readers and writers: the only module that touches files.

Readers return plain objects (GeoDataFrames, DataFrames, :class:`Raster`, :class:`Overlay`) and
raise :class:`regional.errors.InputError` naming the file, layer or column at fault.
"""

from __future__ import annotations

import difflib
import json
import os
import shutil
import tempfile
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from io import BytesIO
from pathlib import Path

import geopandas as gpd
import numpy as np
import pandas as pd
import pyogrio
import pyogrio.errors
import pyproj

from regional.errors import InputError

#: Suffixes read as delimited text by :func:`read_series`.
CSV_SUFFIXES = (".csv", ".csv.gz", ".txt", ".txt.gz")
#: Suffixes read as Parquet.
PARQUET_SUFFIXES = (".parquet", ".pq")
#: Index names of series tables: the line in a text file (header = line 1), or the 1-based row.
LINE, ROW = "line", "row"


@dataclass(frozen=True)
class Raster:
    """A single-band grid read from a raster file.

    Attributes
    ----------
    values : ndarray, shape (rows, cols)
        Cell values (float, NaN where nodata), e.g. elevation in m.
    transform : affine.Affine
        Cell (col, row) -> map (x, y) transform of the upper-left corners.
    crs : pyproj.CRS
        Coordinate reference system of the grid.
    path : str
        File the grid came from (for messages).
    """

    values: np.ndarray
    transform: object
    crs: object
    path: str


@dataclass(frozen=True)
class Overlay:
    """Polygons whose numeric fields are area-averaged over each basin.

    Attributes
    ----------
    frame : GeoDataFrame
        Polygons with a CRS and the numeric ``fields``.
    fields : tuple of str
        Columns to average, each becomes an attribute of the same name.
    source : str
        ``"file:layer"`` for messages.
    """

    frame: gpd.GeoDataFrame
    fields: tuple[str, ...]
    source: str


# --------------------------------------------------------------------------------------------
# Vector layers: basins and overlays
# --------------------------------------------------------------------------------------------


def read_basins(
    path: str | Path,
    layer: str | None = None,
    *,
    id_field: str,
    area_field: str | None = None,
) -> gpd.GeoDataFrame:
    """Read the basins layer (polygons, or points carrying their area).

    Parameters
    ----------
    path : str or Path
        GeoPackage or any vector file GDAL reads.
    layer : str, optional
        Layer name; may be left out when the file holds a single layer.
    id_field : str
        Column holding the basin id. Ids are read as text (``1`` and ``"01"`` differ).
    area_field : str, optional
        Column holding the basin area in km2; it is renamed ``area_km2``.

    Returns
    -------
    GeoDataFrame
        Indexed by ``basin_id`` (str, missing ids as NaN), rows in file order, the layer's CRS
        kept (``None`` when the file has none: :mod:`regional.checks` rejects it).

    Raises
    ------
    InputError
        Missing file, unreadable file, missing layer (the available ones are listed) or missing
        column (the available ones are listed).
    """
    path = _existing_file(path, "basins file")
    layer = _pick_layer(path, layer, what="basins")
    frame = _read_vector(path, layer)
    source = f"{path} (layer '{layer}')"
    _require_columns(frame.columns, [id_field], source=source, key="[basins] id")
    frame = _with_area_column(frame, area_field, source=source)
    ids = _as_text(frame[id_field]).rename("basin_id")
    frame = frame.drop(columns=id_field).set_index(pd.Index(ids, name="basin_id"))
    return frame


def read_overlay(path: str | Path, layer: str | None = None, *, fields: Sequence[str]) -> Overlay:
    """Read an overlay layer: polygons whose numeric ``fields`` are area-averaged per basin.

    Parameters
    ----------
    path : str or Path
        GeoPackage or any vector file GDAL reads.
    layer : str, optional
        Layer name; may be left out when the file holds a single layer.
    fields : sequence of str
        Numeric columns to average.

    Raises
    ------
    InputError
        Missing file, layer or field (available ones listed), or a field that is not numeric.
    """
    path = _existing_file(path, "overlay file")
    layer = _pick_layer(path, layer, what="overlay")
    source = f"{path}:{layer}"
    frame = _read_vector(path, layer)
    _require_columns(frame.columns, fields, source=f"{path} (layer '{layer}')", key="fields")
    for field in fields:
        if not pd.api.types.is_numeric_dtype(frame[field]) or pd.api.types.is_bool_dtype(
            frame[field]
        ):
            raise InputError(
                f"overlay field '{field}' in {path} (layer '{layer}') must be numeric to be "
                f"area-averaged; found type {frame[field].dtype}. Fix: list only numeric fields "
                "in [[overlays]] fields, or convert the field to numbers in your GIS."
            )
    keep = [*fields, frame.geometry.name]
    return Overlay(frame=frame[keep], fields=tuple(fields), source=source)


def list_layers(path: str | Path) -> tuple[str, ...]:
    """Names of the layers (and attribute tables) in a vector file."""
    path = _existing_file(path, "vector file")
    try:
        return tuple(str(name) for name in pyogrio.list_layers(path)[:, 0])
    except (pyogrio.errors.DataSourceError, OSError) as error:
        raise InputError(
            f"cannot read {path} as a vector file ({error}). Fix: give a GeoPackage or another "
            "vector format GDAL reads."
        ) from None


def _pick_layer(path: Path, layer: str | None, *, what: str) -> str:
    layers = list_layers(path)
    if layer is None:
        if len(layers) == 1:
            return layers[0]
        raise InputError(
            f"{path} holds {len(layers)} layers ({_listing(layers)}) and no {what} layer is "
            f'named. Fix: set layer = "..." for the {what} in region.toml.'
        )
    if layer not in layers:
        raise InputError(
            f"layer '{layer}' not found in {path}; available layers: {_listing(layers)}. "
            f"Fix: {_suggestion(layer, layers)}set layer to one of them."
        )
    return layer


def _read_vector(path: Path, layer: str) -> gpd.GeoDataFrame:
    try:
        frame = pyogrio.read_dataframe(path, layer=layer)
    except (pyogrio.errors.DataSourceError, pyogrio.errors.DataLayerError, OSError) as error:
        raise InputError(f"cannot read layer '{layer}' of {path}: {error}.") from None
    if not isinstance(frame, gpd.GeoDataFrame):
        raise InputError(
            f"layer '{layer}' of {path} has no geometry column; it is a plain table. Fix: name "
            "a layer with polygons or points."
        )
    return frame


def _with_area_column(
    frame: gpd.GeoDataFrame, area_field: str | None, *, source: str
) -> gpd.GeoDataFrame:
    if area_field is None or area_field == "area_km2":
        if area_field is not None:
            _require_columns(frame.columns, [area_field], source=source, key="[basins] area")
        return frame
    _require_columns(frame.columns, [area_field], source=source, key="[basins] area")
    if "area_km2" in frame.columns:
        raise InputError(
            f"{source} has both a column 'area_km2' and the area column '{area_field}' named by "
            '[basins] area; it is unclear which holds the area. Fix: set area = "area_km2" or '
            "remove or rename the 'area_km2' column."
        )
    return frame.rename(columns={area_field: "area_km2"})


# --------------------------------------------------------------------------------------------
# Raster
# --------------------------------------------------------------------------------------------


def read_raster(path: str | Path) -> Raster:
    """Read band 1 of a raster (e.g. a DEM in m) as floats with NaN for nodata.

    Raises
    ------
    InputError
        Missing or unreadable file.
    """
    import rasterio
    import rasterio.errors

    path = _existing_file(path, "raster file")
    try:
        with rasterio.open(path) as dataset:
            values = dataset.read(1, masked=True).astype(np.float64).filled(np.nan)
            transform = dataset.transform
            crs = pyproj.CRS.from_wkt(dataset.crs.to_wkt()) if dataset.crs else None
    except rasterio.errors.RasterioError as error:
        raise InputError(
            f"cannot read {path} as a raster ({error}). Fix: give a GeoTIFF or another raster "
            "format GDAL reads."
        ) from None
    return Raster(values=values, transform=transform, crs=crs, path=str(path))


# --------------------------------------------------------------------------------------------
# Series tables
# --------------------------------------------------------------------------------------------


def read_series(
    path: str | Path,
    *,
    id_column: str,
    date_column: str,
    value_columns: Sequence[str],
    layer: str | None = None,
) -> pd.DataFrame:
    """Read the long table of daily series, only the columns asked for.

    Parameters
    ----------
    path : str or Path
        CSV (optionally gzip-compressed), Parquet, or a GeoPackage (then ``layer`` names the
        table).
    id_column, date_column : str
        Basin id (read as text) and date (read as text; parsed by :mod:`regional.checks`).
    value_columns : sequence of str
        Value columns (e.g. precipitation, PET, temperature, flow). Numeric columns come back as
        floats; a column with any non-numeric cell comes back as text for the checks to report.
    layer : str, optional
        Table name inside a GeoPackage.

    Returns
    -------
    DataFrame
        Columns ``id_column``, ``date_column``, then ``value_columns``. The index is the place of
        the row in the file as a user sees it: named ``"line"`` for text files (the header is
        line 1, so the first record is line 2) and ``"row"`` (1-based) for other formats. Rows
        that are entirely blank are dropped.

    Raises
    ------
    InputError
        Missing file, missing table (available ones listed), missing column (available ones
        listed), or an unreadable file.
    """
    path = _existing_file(path, "series file")
    columns = [id_column, date_column, *value_columns]
    name = path.name.lower()
    if name.endswith(CSV_SUFFIXES):
        frame = _read_series_csv(path, columns)
    elif name.endswith(PARQUET_SUFFIXES):
        frame = _read_series_parquet(path, columns)
    else:
        frame = _read_series_table(path, layer, columns)
    frame[id_column] = _as_text(frame[id_column])
    return frame.loc[~frame.isna().all(axis=1)]


def _read_series_csv(path: Path, columns: list[str]) -> pd.DataFrame:
    try:
        header = pd.read_csv(path, nrows=0).columns
        _require_columns(header, columns, source=str(path), key="[series]")
        frame = pd.read_csv(
            path,
            usecols=columns,
            dtype={columns[0]: str, columns[1]: str},
            skip_blank_lines=False,
            low_memory=False,
        )
    except (pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError, OSError) as error:
        raise InputError(
            f"cannot read {path} as a comma-separated table ({error}). Fix: save it as CSV "
            "with a header line and one record per line."
        ) from None
    frame = frame[columns]
    frame.index = pd.RangeIndex(2, len(frame) + 2, name=LINE)
    return frame


def _read_series_parquet(path: Path, columns: list[str]) -> pd.DataFrame:
    import pyarrow
    import pyarrow.parquet

    try:
        available = pyarrow.parquet.ParquetFile(path).schema_arrow.names
        _require_columns(available, columns, source=str(path), key="[series]")
        frame = pd.read_parquet(path, columns=columns)
    except (pyarrow.ArrowException, OSError) as error:
        raise InputError(f"cannot read {path} as Parquet ({error}).") from None
    frame = frame.reset_index(drop=True)
    frame.index = pd.RangeIndex(1, len(frame) + 1, name=ROW)
    return frame


def _read_series_table(path: Path, layer: str | None, columns: list[str]) -> pd.DataFrame:
    layer = _pick_layer(path, layer, what="series table")
    try:
        available = pyogrio.read_info(path, layer=layer)["fields"]
        _require_columns(available, columns, source=f"{path} (layer '{layer}')", key="[series]")
        frame = pyogrio.read_dataframe(path, layer=layer, columns=columns, read_geometry=False)
    except (pyogrio.errors.DataSourceError, pyogrio.errors.DataLayerError, OSError) as error:
        raise InputError(f"cannot read table '{layer}' of {path}: {error}.") from None
    frame = pd.DataFrame(frame)[columns]
    frame.index = pd.RangeIndex(1, len(frame) + 1, name=ROW)
    return frame


# --------------------------------------------------------------------------------------------
# Writers
# --------------------------------------------------------------------------------------------


def write_csv(frame: pd.DataFrame, path: str | Path, *, index: bool = True) -> Path:
    """Write ``frame`` as CSV atomically: to a temporary name in the same folder, then rename.

    A failure leaves any previous file at ``path`` untouched.

    Raises
    ------
    InputError
        The target folder does not exist.
    """
    path = Path(path).expanduser().resolve()
    if not path.parent.is_dir():
        raise InputError(
            f"cannot write {path}: the folder {path.parent} does not exist. Fix: create it or "
            "choose another output path."
        )
    handle, temporary = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=".tmp")
    try:
        with os.fdopen(handle, "w", newline="", encoding="utf-8") as stream:
            frame.to_csv(stream, index=index)
        os.replace(temporary, path)
    except BaseException:
        Path(temporary).unlink(missing_ok=True)
        raise
    return path


# --------------------------------------------------------------------------------------------
# Shared helpers
# --------------------------------------------------------------------------------------------


def _existing_file(path: str | Path, what: str) -> Path:
    path = Path(path).expanduser()
    if not path.exists():
        hint = ""
        if path.parent.is_dir():
            near = difflib.get_close_matches(path.name, os.listdir(path.parent), n=1)
            hint = f"did you mean '{near[0]}'? " if near else ""
        raise InputError(
            f"{what} not found: {path} does not exist. Fix: {hint}correct the path in "
            "region.toml (relative paths start at the folder of region.toml)."
        )
    if path.is_dir() and not path.name.lower().endswith(".gdb"):
        raise InputError(f"{what} {path} is a folder, not a file. Fix: name the file itself.")
    return path.resolve()


def _require_columns(
    available: Sequence[str], wanted: Sequence[str], *, source: str, key: str
) -> None:
    available = [str(name) for name in available]
    for column in wanted:
        if column not in available:
            hint = _suggestion(column, available)
            if len(available) == 1 and ";" in available[0]:
                hint += "the file seems to use ';' between values; save it comma-separated. "
            raise InputError(
                f"column '{column}' (set by {key}) not found in {source}; available columns: "
                f"{_listing(available)}. Fix: {hint}name one of the available columns in "
                "region.toml."
            )


def _as_text(values: pd.Series) -> pd.Series:
    """Ids as stripped text; integral floats lose their ``.0``; blanks become missing."""
    if pd.api.types.is_float_dtype(values):
        known = values.dropna()
        if np.array_equal(known, np.round(known)):
            values = values.astype("Int64")
    text = values.astype("str").str.strip()
    return text.mask(text == "")


def _listing(names: Sequence[str], most: int = 30) -> str:
    shown = ", ".join(f"'{name}'" for name in names[:most])
    more = len(names) - most
    return shown + (f" and {more} more" if more > 0 else "") if names else "none"


def _suggestion(name: str, known: Sequence[str]) -> str:
    match = difflib.get_close_matches(name, list(known), n=1, cutoff=0.6)
    return f"did you mean '{match[0]}'? " if match else ""


# --------------------------------------------------------------------------------------------
# Results folder
# --------------------------------------------------------------------------------------------

RESULTS_GPKG = "results.gpkg"
GPKG_OPTIONS = {"VERSION": "1.2"}
"""GeoPackage dataset creation options: version 1.2, which GDAL 3.6 (Debian stable) reads
without the warning it gives on the 1.4 that newer GDAL writes by default."""


def figure_png(figure, *, dpi: int = 110) -> bytes:
    """Render a matplotlib Figure to PNG bytes (nothing is written to disk).

    A figure with a layout engine is trimmed to its content; one laid out by hand (no engine,
    fixed margins) is saved as it is, which skips a second drawing pass.
    """
    buffer = BytesIO()
    trim = "tight" if figure.get_layout_engine() is not None else None
    figure.savefig(buffer, format="png", dpi=dpi, bbox_inches=trim)
    return buffer.getvalue()


def write_run_folder(
    folder: str | Path,
    *,
    tables: Mapping[str, pd.DataFrame],
    layers: Mapping[str, gpd.GeoDataFrame],
    crs: object,
    figures: Mapping[str, bytes],
    report: str | None,
    manifest: Mapping[str, object],
) -> Path:
    """Write a complete results folder, then move it into place.

    Everything goes to a temporary folder beside ``folder``; only when every file is written is
    the previous ``folder`` (if any) set aside, the new one renamed into place and the old one
    removed. A run that fails or is killed while writing leaves the previous results intact.

    Parameters
    ----------
    folder : str or Path
        The results folder.
    tables : mapping
        File name (``*.csv``) -> table; written without the RangeIndex.
    layers : mapping
        Layer name -> GeoDataFrame for ``results.gpkg``.
    crs : pyproj.CRS or str
        CRS given to layers that carry none.
    figures : mapping
        Name -> PNG bytes, written to ``figures/<name>.png``.
    report : str or None
        HTML text for ``report.html``.
    manifest : mapping
        Written as ``run.json``.

    Returns
    -------
    Path
        The results folder.
    """
    target = Path(folder).expanduser().resolve()
    if not target.parent.is_dir():
        raise InputError(
            f"cannot write results to {target}: the folder {target.parent} does not exist. "
            "Fix: create it or choose another --out folder."
        )
    staging = Path(tempfile.mkdtemp(dir=target.parent, prefix=f".{target.name}.", suffix=".tmp"))
    staging.chmod(0o755)
    try:
        _fill_run_folder(staging, tables, layers, crs, figures, report, manifest)
        _swap_into_place(staging, target)
    except BaseException:
        shutil.rmtree(staging, ignore_errors=True)
        raise
    return target


def _fill_run_folder(staging, tables, layers, crs, figures, report, manifest) -> None:
    for name, table in tables.items():
        keep_index = not isinstance(table.index, pd.RangeIndex)
        table.to_csv(staging / name, index=keep_index)
    for name, layer in layers.items():
        frame = layer if layer.crs is not None else layer.set_crs(crs)
        frame.to_file(
            staging / RESULTS_GPKG,
            layer=name,
            driver="GPKG",
            engine="pyogrio",
            dataset_options=GPKG_OPTIONS,
        )
    if figures:
        (staging / "figures").mkdir()
        for name, png in figures.items():
            (staging / "figures" / f"{name}.png").write_bytes(png)
    if report is not None:
        (staging / "report.html").write_text(report, encoding="utf-8")
    (staging / "run.json").write_text(json.dumps(manifest, indent=2, default=str) + "\n")


def _swap_into_place(staging: Path, target: Path) -> None:
    previous = None
    if target.exists():
        previous = target.with_name(f".{target.name}.previous-{os.getpid()}")
        os.replace(target, previous)
    os.replace(staging, target)
    if previous is not None:
        shutil.rmtree(previous, ignore_errors=True)


def update_run_folder(
    folder: str | Path,
    *,
    tables: Mapping[str, pd.DataFrame],
    layers: Mapping[str, gpd.GeoDataFrame],
    crs: object,
    figures: Mapping[str, bytes],
) -> Path:
    """Add or replace some files of a results folder, each one atomically.

    Used by the commands that redo one stage (``predict``, ``screen``): the other files of an
    earlier full run stay as they are. Every table and figure is written to a temporary name and
    renamed; ``results.gpkg`` is copied, its layers replaced in the copy, and the copy renamed.

    Returns
    -------
    Path
        The results folder (created when absent).
    """
    target = Path(folder).expanduser().resolve()
    if not target.parent.is_dir():
        raise InputError(
            f"cannot write results to {target}: the folder {target.parent} does not exist. "
            "Fix: create it or choose another --out folder."
        )
    target.mkdir(exist_ok=True)
    for name, table in tables.items():
        write_csv(table, target / name, index=not isinstance(table.index, pd.RangeIndex))
    if figures:
        (target / "figures").mkdir(exist_ok=True)
    for name, png in figures.items():
        _write_bytes_atomically(target / "figures" / f"{name}.png", png)
    if layers:
        _replace_layers(target / RESULTS_GPKG, layers, crs)
    return target


def _write_bytes_atomically(path: Path, content: bytes) -> None:
    handle, temporary = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=".tmp")
    try:
        with os.fdopen(handle, "wb") as stream:
            stream.write(content)
        os.replace(temporary, path)
    except BaseException:
        Path(temporary).unlink(missing_ok=True)
        raise


def _replace_layers(gpkg: Path, layers: Mapping[str, gpd.GeoDataFrame], crs: object) -> None:
    handle, temporary = tempfile.mkstemp(dir=gpkg.parent, prefix=".results.", suffix=".tmp.gpkg")
    os.close(handle)
    staged = Path(temporary)
    try:
        if gpkg.exists():
            shutil.copyfile(gpkg, staged)
            existing = {name for name, _ in pyogrio.list_layers(staged)}
        else:
            staged.unlink()
            existing = set()
        for name, layer in layers.items():
            frame = layer if layer.crs is not None else layer.set_crs(crs)
            if name in existing:
                pyogrio.write_dataframe(
                    frame, staged, layer=name, driver="GPKG", layer_options={"OVERWRITE": "YES"}
                )
            else:
                frame.to_file(
                    staged,
                    layer=name,
                    driver="GPKG",
                    engine="pyogrio",
                    dataset_options=GPKG_OPTIONS,
                )
        os.replace(staged, gpkg)
    except BaseException:
        staged.unlink(missing_ok=True)
        raise
