"""Readers and writers: the only module that touches files.

Readers return plain objects (GeoDataFrames, DataFrames, :class:`Raster`, :class:`Overlay`) and
raise :class:`regional.errors.InputError` naming the file, layer or column at fault.
"""

from __future__ import annotations

import difflib
import errno
import hashlib
import json
import os
import re
import shutil
import signal
import stat
import tempfile
import threading
from collections.abc import Callable, Iterator, Mapping, Sequence
from contextlib import contextmanager
from dataclasses import dataclass
from functools import cache, partial
from io import BytesIO
from pathlib import Path

import geopandas as gpd
import numpy as np
import pandas as pd
import pyogrio
import pyogrio.errors
import pyproj

from regional.errors import InputError, RunError

#: Suffixes read as delimited text by :func:`read_series`.
CSV_SUFFIXES = (".csv", ".csv.gz", ".txt", ".txt.gz")
#: Suffixes read as Parquet.
PARQUET_SUFFIXES = (".parquet", ".pq")
#: Rows per batch when the series table is streamed (:func:`iter_series`).
SERIES_BATCH_ROWS = 1_000_000
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


def iter_series(
    path: str | Path,
    *,
    id_column: str,
    date_column: str,
    value_columns: Sequence[str],
    layer: str | None = None,
    batch_rows: int = SERIES_BATCH_ROWS,
) -> Iterator[pd.DataFrame]:
    """Read the long table of daily series in batches of rows, only the columns asked for.

    Each batch is what :func:`read_series` returns for the whole file, restricted to some
    consecutive rows: the index keeps the place of each row in the file (``"line"`` or
    ``"row"``), so messages name the same line whichever batch holds it. CSV and Parquet are
    read ``batch_rows`` rows at a time (Parquet by record batches of its row groups); a table
    of a GeoPackage comes as one batch.

    Parameters
    ----------
    path, id_column, date_column, value_columns, layer
        As for :func:`read_series`.
    batch_rows : int, default 1,000,000
        Rows per batch (at most).

    Yields
    ------
    DataFrame
        Columns ``id_column``, ``date_column``, then ``value_columns``.
    """
    path = _existing_file(path, "series file")
    columns = [id_column, date_column, *value_columns]
    name = path.name.lower()
    if name.endswith(CSV_SUFFIXES):
        batches = _iter_series_csv(path, columns, batch_rows)
    elif name.endswith(PARQUET_SUFFIXES):
        batches = _iter_series_parquet(path, columns, batch_rows)
    else:
        batches = iter([_read_series_table(path, layer, columns)])
    for frame in batches:
        frame[id_column] = _as_text(frame[id_column])
        yield frame.loc[~frame.isna().all(axis=1)]


def _iter_series_csv(path: Path, columns: list[str], batch_rows: int) -> Iterator[pd.DataFrame]:
    header = _csv_header(path)
    _require_columns(header, columns, source=str(path), key="[series]")
    first_line = 2
    try:
        reader = pd.read_csv(
            path,
            usecols=columns,
            dtype={columns[0]: str, columns[1]: str},
            skip_blank_lines=False,
            chunksize=batch_rows,
        )
        for frame in reader:
            frame = frame[columns]
            frame.index = pd.RangeIndex(first_line, first_line + len(frame), name=LINE)
            first_line += len(frame)
            yield frame
    except (pd.errors.ParserError, UnicodeDecodeError, OSError) as error:
        raise _csv_error(path, error) from None


def _iter_series_parquet(
    path: Path, columns: list[str], batch_rows: int
) -> Iterator[pd.DataFrame]:
    import pyarrow
    import pyarrow.parquet

    first_row = 1
    try:
        source = pyarrow.parquet.ParquetFile(path)
        _require_columns(source.schema_arrow.names, columns, source=str(path), key="[series]")
        for batch in source.iter_batches(batch_size=batch_rows, columns=columns):
            frame = batch.to_pandas()[columns]
            frame.index = pd.RangeIndex(first_row, first_row + len(frame), name=ROW)
            first_row += len(frame)
            yield frame
    except (pyarrow.ArrowException, OSError) as error:
        raise InputError(f"cannot read {path} as Parquet ({error}).") from None
    finally:
        pyarrow.default_memory_pool().release_unused()  # decoding buffers of the row groups


STORE_KEY = b"regional.series_store"
"""Key of the Parquet file metadata that marks a series store and lists its basins."""


def write_series_store(
    path: str | Path, tables: Iterator[pd.DataFrame], *, basins: Sequence[str]
) -> Path:
    """Write a series store: a Parquet file with one row group per basin, atomically.

    Parameters
    ----------
    path : str or Path
        The file to write (a temporary name beside it is renamed into place when complete).
    tables : iterator of DataFrame
        One long table per basin, in the order of ``basins``; every table has the same columns
        (the basin id, the date, float32 values).
    basins : sequence of str
        Basin ids, in row-group order: stored in the file metadata, so a reader finds the row
        group of a basin without reading any other.

    Returns
    -------
    Path
        The file written.
    """
    import pyarrow
    import pyarrow.parquet

    target = Path(path).expanduser().resolve()

    def write(stream) -> None:
        writer = None
        try:
            for table in tables:
                arrow = pyarrow.Table.from_pandas(table, preserve_index=False)
                if writer is None:
                    meta = {STORE_KEY: json.dumps({"version": 1, "basins": list(basins)})}
                    schema = arrow.schema.with_metadata(meta)
                    writer = pyarrow.parquet.ParquetWriter(stream, schema, compression="zstd")
                writer.write_table(arrow.replace_schema_metadata(writer.schema.metadata))
        finally:
            if writer is not None:
                writer.close()

    _write_atomically(target, write, text=False)
    return target


def series_store_basins(path: str | Path) -> tuple[str, ...] | None:
    """Basin ids of a series store in row-group order, or None when ``path`` is not one."""
    import pyarrow
    import pyarrow.parquet

    path = Path(path)
    if not path.name.lower().endswith(PARQUET_SUFFIXES) or not path.is_file():
        return None
    try:
        meta = pyarrow.parquet.read_schema(path).metadata or {}
    except (pyarrow.ArrowException, OSError):
        return None
    if STORE_KEY not in meta:
        return None
    return tuple(json.loads(meta[STORE_KEY])["basins"])


def iter_store_blocks(
    path: str | Path, columns: Sequence[str], *, batch_rows: int = SERIES_BATCH_ROWS
) -> Iterator[tuple[range, np.ndarray, pd.DataFrame]]:
    """Read a series store a few row groups (basins) at a time, only ``columns``.

    Each block is what :func:`iter_series` yields for a Parquet file (ids as text, empty rows
    dropped, the index the place of each row in the file, named ``"row"``), cut at row groups
    instead of inside them: consecutive groups of at most ``batch_rows`` rows in all (or one
    larger group alone), so messages name the same row.

    Yields
    ------
    (range, ndarray of int, DataFrame)
        The row groups of the block, the row (as in the index) where each of them starts,
        and their rows.
    """
    import pyarrow
    import pyarrow.parquet

    path = _existing_file(path, "series file")
    first_row = 1
    try:
        with pyarrow.parquet.ParquetFile(path) as source:
            _require_columns(source.schema_arrow.names, columns, source=str(path), key="[series]")
            meta = source.metadata
            rows = np.array([meta.row_group(g).num_rows for g in range(meta.num_row_groups)])
            for groups in _group_runs(rows, batch_rows):
                starts = first_row + np.concatenate([[0], np.cumsum(rows[groups])[:-1]])
                frame = source.read_row_groups(list(groups), columns=list(columns)).to_pandas()
                frame = frame[list(columns)]
                frame.index = pd.RangeIndex(first_row, first_row + len(frame), name=ROW)
                first_row += len(frame)
                frame[columns[0]] = _as_text(frame[columns[0]])
                yield groups, starts.astype(int), frame.loc[~frame.isna().all(axis=1)]
                del frame
                release_arrow_memory()
    except (pyarrow.ArrowException, OSError) as error:
        raise InputError(f"cannot read {path} as Parquet ({error}).") from None


def _group_runs(rows: np.ndarray, batch_rows: int) -> Iterator[range]:
    """Consecutive row groups of at most ``batch_rows`` rows in all (a larger group alone)."""
    first, total = 0, 0
    for group, count in enumerate(rows):
        if group > first and total + count > batch_rows:
            yield range(first, group)
            first, total = group, 0
        total += int(count)
    if len(rows):
        yield range(first, len(rows))


def release_arrow_memory() -> None:
    """Give the memory Arrow keeps for reuse (decoded row groups) back to the system."""
    import pyarrow

    pyarrow.default_memory_pool().release_unused()


def read_store_groups(
    path: str | Path, groups: Sequence[int], columns: Sequence[str]
) -> tuple[pd.DataFrame, np.ndarray]:
    """Read only the given row groups (one basin each) of a series store, only ``columns``.

    Returns
    -------
    (DataFrame, ndarray of int)
        The groups' rows one after another, in the order of ``groups`` (one read of all of
        them: no frame per group), and the rows of each group.
    """
    import pyarrow
    import pyarrow.parquet

    try:
        with pyarrow.parquet.ParquetFile(path) as source:
            rows = np.array([source.metadata.row_group(g).num_rows for g in groups], dtype=int)
            table = source.read_row_groups(list(groups), columns=list(columns))
            return table.to_pandas(), rows
    except (pyarrow.ArrowException, OSError) as error:
        raise RunError(
            f"cannot read the series store {path} ({error}). Fix: make the file readable "
            "at this path on every worker (a shared file system), or run without the store."
        ) from None


def _csv_header(path: Path) -> pd.Index:
    try:
        return pd.read_csv(path, nrows=0).columns
    except (pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError, OSError) as error:
        raise _csv_error(path, error) from None


def _csv_error(path: Path, error: Exception) -> InputError:
    return InputError(
        f"cannot read {path} as a comma-separated table ({error}). Fix: save it as CSV "
        "with a header line and one record per line."
    )


def _read_series_csv(path: Path, columns: list[str]) -> pd.DataFrame:
    frames = list(_iter_series_csv(path, columns, SERIES_BATCH_ROWS))
    if not frames:  # a header and no records
        return pd.DataFrame(columns=columns, index=pd.RangeIndex(2, 2, name=LINE))
    return pd.concat(frames)


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
# The user's table of calibrated parameters
# --------------------------------------------------------------------------------------------

PARAMETER_ID = "basin_id"
"""Id column of the user's parameter table (``[model] parameters``)."""


def read_parameter_table(path: str | Path) -> pd.DataFrame:
    """Read the user's table of calibrated parameters, every cell as text.

    Parameters
    ----------
    path : str or Path
        CSV (optionally gzip-compressed) or Parquet: a ``basin_id`` column and one column per
        model parameter (e.g. ``k_per_day``, 1/day).

    Returns
    -------
    DataFrame
        ``basin_id`` as text, the other columns as read (text for CSV, blank cells missing),
        checked and converted by :func:`regional.checks.check_parameter_table`. The index is
        the place of the row in the file: ``"line"`` for CSV (the header is line 1), ``"row"``
        (1-based) for Parquet. Entirely blank rows are dropped.

    Raises
    ------
    InputError
        Missing or unreadable file, no ``basin_id`` column.
    """
    path = _existing_file(path, "parameter table ([model] parameters)")
    if path.name.lower().endswith(PARQUET_SUFFIXES):
        try:
            frame = pd.read_parquet(path).reset_index(drop=True)
        except (OSError, ValueError) as error:
            raise InputError(f"cannot read {path} as Parquet ({error}).") from None
        frame.index = pd.RangeIndex(1, len(frame) + 1, name=ROW)
    else:
        try:
            frame = pd.read_csv(path, dtype=str, keep_default_na=False, skip_blank_lines=False)
        except (pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError) as error:
            raise InputError(
                f"cannot read {path} as a comma-separated table ({error}). Fix: save it as CSV "
                "with a header line and one basin per line."
            ) from None
        frame.index = pd.RangeIndex(2, len(frame) + 2, name=LINE)
        frame = frame.apply(lambda column: column.str.strip()).replace("", np.nan)
    frame.columns = [str(column).strip() for column in frame.columns]
    if PARAMETER_ID not in frame.columns:
        raise InputError(
            f"parameter table {path} ([model] parameters) has no '{PARAMETER_ID}' column; "
            f"found columns {_listing(list(frame.columns))}. Fix: name the id column "
            f"'{PARAMETER_ID}' and give one column per model parameter (e.g. 'k_per_day')."
        )
    frame[PARAMETER_ID] = _as_text(frame[PARAMETER_ID])
    return frame.loc[~frame.isna().all(axis=1)]


# --------------------------------------------------------------------------------------------
# Checksums
# --------------------------------------------------------------------------------------------


def file_checksums(paths: Sequence[str | Path]) -> dict[str, str]:
    """SHA-256 (hex) of each file, by its path as text."""
    return {str(path): sha256(path) for path in paths}


def sha256(path: str | Path) -> str:
    """SHA-256 (hex) of one file, read in blocks of 1 MiB."""
    digest = hashlib.sha256()
    with open(path, "rb") as stream:
        for block in iter(lambda: stream.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


# --------------------------------------------------------------------------------------------
# Writers
# --------------------------------------------------------------------------------------------


def write_csv(frame: pd.DataFrame, path: str | Path, *, index: bool = True) -> Path:
    """Write ``frame`` as CSV atomically: to a temporary name in the same folder, then rename.

    A failure leaves any previous file at ``path`` untouched. The file's mode follows the
    user's umask (e.g. 0644 under a umask of 022).

    Raises
    ------
    InputError
        The target folder does not exist.
    RunError
        The system refused the write (disk full, permission denied); the temporary file is
        removed.
    """
    path = Path(path).expanduser().resolve()
    if not path.parent.is_dir():
        raise InputError(
            f"cannot write {path}: the folder {path.parent} does not exist. Fix: create it or "
            "choose another output path."
        )
    try:
        _write_atomically(path, lambda stream: frame.to_csv(stream, index=index), text=True)
    except OSError as error:
        raise _write_failure(path, error) from error
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
# Results folder: ownership, refusal rules, atomic writes
# --------------------------------------------------------------------------------------------

RESULTS_GPKG = "results.gpkg"
GPKG_OPTIONS = {"VERSION": "1.2"}
"""GeoPackage dataset creation options: version 1.2, which GDAL 3.6 (Debian stable) reads
without the warning it gives on the 1.4 that newer GDAL writes by default."""
#: The manifest that marks a folder as results written by this tool.
MANIFEST = "run.json"
#: ``tool`` and ``format`` fields of the manifest (``format`` grows when the layout changes).
TOOL, FORMAT = "regional", 1
#: Temporary names this module leaves beside a target while writing: ``.<name>.<pid>.<random>``
#: then ``.tmp`` (being written), ``.old`` (an earlier folder set aside) or ``.tmp.gpkg``; and
#: ``.<name>.previous-<pid>`` from earlier versions.
_TEMPORARY = r"\.(?P<pid>\d+)\.[a-z0-9_]+\.(?:tmp|old|tmp\.gpkg)|\.previous-(?P<old>\d+)"
#: Tries to move a new folder into place while other writers race for the same name.
_SWAP_ATTEMPTS = 50
#: Looks at a folder that must all find it foreign before it is refused.
_LOOKS = 3


def figure_png(figure, *, dpi: int = 110) -> bytes:
    """Render a matplotlib Figure to PNG bytes (nothing is written to disk).

    A figure with a layout engine is trimmed to its content; one laid out by hand (no engine,
    fixed margins) is saved as it is, which skips a second drawing pass.
    """
    buffer = BytesIO()
    trim = "tight" if figure.get_layout_engine() is not None else None
    figure.savefig(buffer, format="png", dpi=dpi, bbox_inches=trim)
    return buffer.getvalue()


def read_manifest(folder: str | Path) -> dict | None:
    """The manifest (``run.json``) of a results folder written by this tool, else None.

    A folder is recognised by a ``run.json`` holding a JSON object with ``"tool": "regional"``
    and an integer ``"format"``; or, for folders written before the format field existed, a
    ``"regional"`` version text and no ``"format"`` field.
    """
    path = Path(folder) / MANIFEST
    try:
        manifest = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, ValueError):
        return None
    if not isinstance(manifest, dict):
        return None
    current = manifest.get("tool") == TOOL and isinstance(manifest.get("format"), int)
    earlier = "format" not in manifest and isinstance(manifest.get(TOOL), str)
    return manifest if current or earlier else None


def is_results_folder(folder: str | Path) -> bool:
    """True when ``folder`` is a folder holding a manifest of this tool (see
    :func:`read_manifest`)."""
    return Path(folder).is_dir() and read_manifest(folder) is not None


def check_output_folder(
    folder: str | Path,
    *,
    inputs: Sequence[str | Path],
    region_folder: str | Path,
    update: bool = False,
) -> Path:
    """Refuse, before any computation, an output folder a run must not replace.

    Rules (docs/outputs.md): the parent must exist and be writable; the target must not be
    the region folder, an input, nor a folder holding any input (an ancestor of the inputs);
    it must be absent, an empty folder, or an earlier results folder of this tool. A stage
    update (``update=True``: ``predict``, ``screen``) needs an earlier results folder.

    Parameters
    ----------
    folder : str or Path
        The results folder asked for.
    inputs : sequence of str or Path
        Every file the region names (settings, basins, overlays, raster, series).
    region_folder : str or Path
        The folder of ``region.toml``.
    update : bool, default False
        The target must already be a results folder of this tool.

    Returns
    -------
    Path
        The target, absolute.

    Raises
    ------
    InputError
        Naming the path, what it is, and what to do.
    """
    target = Path(folder).expanduser().resolve()
    _check_parent(target, what="results")
    region = Path(region_folder).expanduser().resolve()
    if target == region:
        raise InputError(
            f"refusing to write results to {target}: it is the region folder, and a run "
            "replaces its whole output folder, inputs included. Fix: choose a new folder, e.g. "
            f"--out {target / 'results'}."
        )
    for path in sorted({Path(p).expanduser().resolve() for p in inputs}):
        if path == target or target in path.parents:
            what = "is" if path == target else "holds"
            raise InputError(
                f"refusing to write results to {target}: it {what} the region's input {path}, "
                "and a run replaces its whole output folder. Fix: choose a folder that holds "
                f"no input, e.g. --out {region / 'results'}."
            )
    _check_replaceable(target)
    if update and not is_results_folder(target):
        raise InputError(
            f"no earlier results at {target}: predict and screen update the folder of a "
            f"complete run (with its {MANIFEST}). Fix: run 'regional run' with this output "
            "folder first, or point --out at an earlier results folder."
        )
    return target


def check_output_file(path: str | Path, *, inputs: Sequence[str | Path]) -> Path:
    """Refuse, before any computation, an output file that would overwrite an input or
    is not a regular file; the parent must exist and be writable.

    Returns
    -------
    Path
        The target, absolute.

    Raises
    ------
    InputError
        Naming the path, what it is, and what to do.
    """
    target = Path(path).expanduser().resolve()
    _check_parent(target, what="output")
    if target in {Path(p).expanduser().resolve() for p in inputs}:
        raise InputError(
            f"refusing to write {target}: it is one of the region's inputs. Fix: name a new "
            "file, e.g. attributes.csv."
        )
    if target.exists() and not target.is_file():
        kind = "a folder" if target.is_dir() else "not a regular file"
        raise InputError(
            f"refusing to write {target}: it is {kind}. Fix: name a file, e.g. "
            f"{target / 'attributes.csv'}."
            if target.is_dir()
            else f"refusing to write {target}: it is {kind}. Fix: name a regular file."
        )
    return target


def _check_parent(target: Path, *, what: str) -> None:
    parent = target.parent
    if not parent.is_dir():
        raise InputError(
            f"cannot write {what} to {target}: the folder {parent} does not exist. Fix: create "
            "it or choose another output path."
        )
    if not os.access(parent, os.W_OK | os.X_OK):
        raise InputError(
            f"cannot write {what} to {target}: the folder {parent} is read-only for this user. "
            "Fix: choose an output path in a folder you may write to."
        )


def _check_replaceable(target: Path) -> None:
    """The target is absent, an empty folder, or a results folder of this tool.

    A folder is judged foreign only when several looks agree: another writer may swap its
    results into place between two looks, and must not make this one refuse.
    """
    try:
        is_folder = stat.S_ISDIR(target.stat().st_mode)  # one look: writers only place folders
    except FileNotFoundError:
        is_folder = not target.is_symlink()  # absent (fine), or a link to nowhere
    if not is_folder:
        raise InputError(
            f"refusing to write results to {target}: it is a file, not a folder. Fix: choose "
            "a folder name that is free, or an earlier results folder."
        )
    if not all(_looks_foreign(target) for _ in range(_LOOKS)):
        return
    raise InputError(
        f"refusing to replace {target}: it holds files and is not a results folder of "
        f"this tool (no {MANIFEST} written by regional). Fix: choose an empty or new "
        "folder, or move those files away first."
    )


def _looks_foreign(target: Path) -> bool:
    """A folder that holds files but no manifest of this tool (False once it is gone)."""
    try:
        filled = any(target.iterdir())
    except (FileNotFoundError, NotADirectoryError):
        return False
    return filled and not is_results_folder(target) and target.is_dir()


def write_run_folder(
    folder: str | Path,
    *,
    tables: Mapping[str, pd.DataFrame | TableParts | Callable[[], pd.DataFrame | TableParts]],
    layers: Mapping[str, gpd.GeoDataFrame | Callable[[], gpd.GeoDataFrame]],
    crs: object,
    figures: Mapping[str, bytes] | Callable[[], Mapping[str, bytes]],
    report: str | None | Callable[[], str | None],
    manifest: Mapping[str, object],
    files: Mapping[str, ExtraFile] | None = None,
) -> Path:
    """Write a complete results folder, then move it into place.

    Everything goes to a temporary folder beside ``folder``; only when every file is written is
    the previous ``folder`` (if any) set aside, the new one renamed into place and the old one
    removed. A run that fails or is killed while writing leaves the previous results intact;
    temporary folders of runs that died (their process is gone) are removed by the next write
    to the same place. The target is replaced only when it is absent, empty or an earlier
    results folder of this tool (see :func:`check_output_folder`); two writers racing for it
    leave one whole folder, the last one moved into place. Modes follow the user's umask.

    Parameters
    ----------
    folder : str or Path
        The results folder.
    tables : mapping
        File name (``*.csv``) -> table (or :class:`TableParts`); written without the RangeIndex.
        A call giving the table is made when its file is written (one table held at a time).
    layers : mapping
        Layer name -> GeoDataFrame for ``results.gpkg``, or a call giving it (made when the
        layer is written).
    crs : pyproj.CRS or str
        CRS given to layers that carry none.
    figures : mapping, iterable or callable
        Name -> PNG bytes (or (name, bytes) pairs), written to ``figures/<name>.png`` one by
        one as they come; or a call giving them, made once the tables and layers are written
        (figures drawn elsewhere meanwhile).
    report : str, None or callable
        HTML text for ``report.html``; or a call made after the figures are written, given
        them as a mapping (:class:`FigureFiles`: name -> PNG bytes, read from the written
        files when asked for) and giving the text, whole or as pieces written one after
        another.
    manifest : mapping
        Written as ``run.json``, with ``tool`` and ``format`` added (the ownership marker).
    files : mapping, optional
        Further files by relative name (one sub-folder deep, e.g. ``fitted/region.json``):
        bytes written as they are, DataFrames as Parquet (index kept), :class:`TableParts` as
        Parquet a row group per part (one part held at a time); a call is made when its file
        is written and gives the DataFrame (held only while it is written).

    Returns
    -------
    Path
        The results folder.

    Raises
    ------
    InputError
        The parent folder is missing, or the target is not a folder this tool may replace.
    RunError
        The system refused a write (disk full, permission denied); the earlier results are
        intact and the temporary folder is removed.
    """
    target = Path(folder).expanduser().resolve()
    _check_parent(target, what="results")
    _check_replaceable(target)
    remove_stale_temporaries(target)
    staging = None
    try:
        with _signals_held():
            staging = _temporary_folder(target, ".tmp")
        staging.chmod(_dir_mode())
        _fill_run_folder(staging, tables, layers, crs, figures, report, manifest)
        for name, content in (files or {}).items():
            _write_file(staging, name, content)
        _swap_into_place(staging, target)
    except OSError as error:
        _remove(staging)
        raise _write_failure(target, error) from error
    except BaseException:
        _remove(staging)
        raise
    return target


@contextmanager
def _signals_held() -> Iterator[None]:
    """Hold Ctrl-C and SIGTERM over a step that must not be cut in two (creating and
    recording a temporary name, swapping folders); a signal that came meanwhile is acted on
    right after, by the handler that was in place.

    Python runs signal handlers in the main thread whichever thread the system delivered the
    signal to, so the handlers are swapped for recorders there; elsewhere nothing is held.
    """
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    caught: list[int] = []
    held = (signal.SIGINT, signal.SIGTERM)
    previous = {number: signal.signal(number, lambda n, _: caught.append(n)) for number in held}
    try:
        yield
    finally:
        for number, handler in previous.items():
            signal.signal(number, signal.SIG_DFL if handler is None else handler)
        if caught:
            _deliver(caught[0], previous[caught[0]])


def _deliver(number: int, handler) -> None:
    """Act on a held signal as its handler would have."""
    if callable(handler):
        handler(number, None)
    elif handler != signal.SIG_IGN:
        os.kill(os.getpid(), number)  # the default action, e.g. end the process


def _temporary_folder(target: Path, suffix: str) -> Path:
    prefix = _temporary_prefix(target)
    return Path(tempfile.mkdtemp(dir=target.parent, prefix=prefix, suffix=suffix))


def _remove(path: Path | None) -> None:
    if path is not None:
        shutil.rmtree(path, ignore_errors=True)


def remove_stale_temporaries(target: str | Path) -> list[Path]:
    """Remove the temporary files and folders of dead writers beside (or inside) ``target``.

    A temporary name carries the writer's process id; one whose process no longer runs (a
    run killed by SIGKILL, a power cut) is removed. Those of running writers are kept.

    Returns
    -------
    list of Path
        What was removed.
    """
    target = Path(target)
    pattern = re.compile(r"\." + re.escape(target.name) + f"(?:{_TEMPORARY})$")
    places = [(target.parent, pattern)]
    if target.is_dir():
        places.append((target, re.compile(r"\..+?(?:" + _TEMPORARY + ")$")))
        if (target / "figures").is_dir():
            places.append((target / "figures", re.compile(r"\..+?(?:" + _TEMPORARY + ")$")))
    removed = []
    for place, regex in places:
        for entry in _entries(place):
            match = regex.fullmatch(entry.name)
            if match is None:
                continue
            pid = int(match.group("pid") or match.group("old"))
            if _process_alive(pid):
                continue
            if entry.is_dir() and not entry.is_symlink():
                shutil.rmtree(entry, ignore_errors=True)
            else:
                entry.unlink(missing_ok=True)
            removed.append(entry)
    return removed


def _entries(folder: Path) -> list[Path]:
    try:
        return list(folder.iterdir())
    except OSError:
        return []


def _process_alive(pid: int) -> bool:
    if pid == os.getpid():
        return True
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except OSError:  # e.g. PermissionError: it exists under another user
        return True
    return True


def _temporary_prefix(target: Path) -> str:
    return f".{target.name}.{os.getpid()}."


def _umask() -> int:
    """The process umask, read without changing it where the system allows."""
    try:
        for line in Path("/proc/self/status").read_text().splitlines():
            if line.startswith("Umask:"):
                return int(line.split()[1], 8)
    except (OSError, ValueError):
        pass
    mask = os.umask(0o022)
    os.umask(mask)
    return mask


def _dir_mode() -> int:
    """Mode of a new folder under the user's umask (0755 under 022)."""
    return 0o777 & ~_umask()


def _file_mode() -> int:
    """Mode of a new file under the user's umask (0644 under 022)."""
    return 0o666 & ~_umask()


def _write_failure(target: Path, error: OSError) -> RunError:
    reason = error.strerror or str(error)
    where = f" ({error.filename})" if error.filename else ""
    fix = {
        errno.ENOSPC: "free disk space or choose an output folder on another disk",
        errno.EDQUOT: "free space within your quota or choose another output folder",
        errno.EACCES: "choose an output folder you may write to",
        errno.EPERM: "choose an output folder you may write to",
        errno.EROFS: "choose an output folder on a writable disk",
    }.get(error.errno, "check the disk and the folder's permissions, then run again")
    return RunError(
        f"cannot write {target}: {reason}{where}. Earlier results there are intact and the "
        f"temporary files were removed. Fix: {fix}."
    )


@dataclass(frozen=True)
class TableParts:
    """A table written as one file part by part, so that its rows are never all in memory.

    ``parts()`` yields DataFrames with the same columns (at least one, maybe empty). As CSV
    (a RangeIndex each) the file is their concatenation: the header once, then every part's
    rows, the same bytes as the whole table written at once. As Parquet (a further file of
    :func:`write_run_folder`, index kept) each part is one row group: read back, the file
    gives the whole table.
    """

    parts: Callable[[], Iterator[pd.DataFrame]]


CSV_ROWS = 32_768
"""Rows of a table turned into text and written at a time (:func:`_table_to_csv`): the text
of a float takes about 100 bytes while it is written, so a table's rows are never all text
at once."""


def _table_to_csv(
    table: pd.DataFrame | TableParts, stream, *, rows_at_a_time: int = CSV_ROWS
) -> None:
    """Write a table (or its parts) as CSV, without the index when it is a RangeIndex, the
    text of ``rows_at_a_time`` rows at a time (the same bytes as the whole at once)."""
    whole = not isinstance(table, TableParts)
    parts = iter([table]) if whole else table.parts()
    header = True
    for part in parts:
        index = whole and not isinstance(part.index, pd.RangeIndex)
        for first in range(0, max(len(part), 1), rows_at_a_time):
            rows = part.iloc[first : first + rows_at_a_time]
            text = None if index else _plain_csv(rows, header=header)
            if text is None:
                _float_text(rows).to_csv(stream, index=index, header=header)
            else:
                stream.write(text)
            header = False


CSV_SPECIAL = re.compile(r'[,"\r\n]')
"""Characters that make pandas' CSV writer quote a text field (delimiter, quote, line ends)."""


def _plain_csv(table: pd.DataFrame, *, header: bool) -> str | None:
    """The CSV text pandas writes for ``table`` without its index, each column turned into text
    and the rows joined by Arrow's compute functions (several times faster than pandas for a
    table of daily flows); None when a column needs pandas' own rules (text to quote or
    missing, times of day, other dtypes), or no row."""
    import pyarrow.compute as pc

    if not len(table) or any(
        not isinstance(n, str) or not n or CSV_SPECIAL.search(n) for n in table
    ):
        return None
    columns = [_plain_column(table.iloc[:, i]) for i in range(table.shape[1])]
    if any(column is None for column in columns):
        return None
    end = os.linesep
    rows = pc.binary_join_element_wise(*columns, ",")
    lines = _joined_text(pc.binary_join_element_wise(rows, "", end), len(table))
    return ",".join(table.columns) + end + lines if header else lines


def _joined_text(lines, n_rows: int) -> str:
    """The text of an Arrow string array's values one after another (its data buffer)."""
    import pyarrow

    if not isinstance(lines, pyarrow.Array):  # every column was one value: a scalar
        return lines.as_py() * n_rows
    offsets = np.frombuffer(lines.buffers()[1], dtype=np.int32)[lines.offset :]
    first, last = int(offsets[0]), int(offsets[len(lines)])
    return lines.buffers()[2].slice(first, last - first).to_pybytes().decode("utf-8")


def _plain_column(column: pd.Series):
    """The text pandas writes for each value of a float64, integer, date or plain text column,
    as an Arrow string array (or scalar, for a float64 column of one value); None for any
    other column."""
    import pyarrow
    import pyarrow.compute as pc

    dtype = column.dtype
    if dtype == np.float64:
        return _column_arrow_text(column.to_numpy())
    if pd.api.types.is_integer_dtype(dtype) and not pd.api.types.is_extension_array_dtype(dtype):
        return pc.cast(pyarrow.array(column.to_numpy()), pyarrow.string())
    if pd.api.types.is_datetime64_dtype(dtype):
        values = column.to_numpy()
        days = values.astype("datetime64[D]")
        if np.isnat(values).any() or (days != values).any():
            return None  # pandas writes missing dates and times of day in its own way
        return pc.cast(pyarrow.array(days), pyarrow.string())
    if pd.api.types.is_string_dtype(dtype):
        return _plain_text(column)
    return None


def _plain_text(column: pd.Series):
    """A text column as an Arrow string array, or None when pandas would quote a value or
    write one as missing (empty, missing, a delimiter, quote or line end inside)."""
    import pyarrow
    import pyarrow.compute as pc

    try:
        text = pyarrow.array(column.to_numpy(dtype=object), type=pyarrow.string())
    except (pyarrow.ArrowInvalid, pyarrow.ArrowTypeError):
        return None  # values that are not all text
    if text.null_count or pc.any(pc.match_substring_regex(text, CSV_SPECIAL_OR_EMPTY)).as_py():
        return None
    return text


CSV_SPECIAL_OR_EMPTY = CSV_SPECIAL.pattern + "|^$"
""":data:`CSV_SPECIAL` or an empty value, as an Arrow (RE2) pattern."""

ARROW_PLAIN_RANGE = (1e-4, 1e10)
"""Magnitudes Python's ``repr`` writes without an exponent (from 1e-4 up to 1e16) and Arrow's
float-to-text cast writes with the same shortest round-trip digits (up to 1e10), whole numbers
apart (Arrow writes 2.0 as "2"); every other value (whole numbers, tiny or huge ones, NaN,
infinities) takes ``repr``'s text, value by value."""


def _column_arrow_text(values: np.ndarray):
    """The text of a float64 column (see :func:`_float_text`) as an Arrow string array: Arrow
    casts the values within :data:`ARROW_PLAIN_RANGE` (the digits of ``repr``, checked by
    :func:`_arrow_writes_repr`), ``repr`` the rest; a scalar when the column is one value."""
    import pyarrow
    import pyarrow.compute as pc

    if _one_value(values):
        return pyarrow.scalar(_float_repr(values[0]))
    if not _arrow_writes_repr():
        return pyarrow.array(_column_text(values), type=pyarrow.string())
    low, high = ARROW_PLAIN_RANGE
    with np.errstate(invalid="ignore"):
        size = np.abs(values)
        other = ~((size >= low) & (size < high)) | (values == np.trunc(values))
    text = pc.cast(pyarrow.array(values), pyarrow.string())
    if other.any():
        own = pyarrow.array(_column_text(values[other]), type=pyarrow.string())
        text = pc.replace_with_mask(text, pyarrow.array(other), own)
    return text


ARROW_PROBE = (
    1e-4,
    1.5e-4,
    7e-3,
    0.1,
    1 / 3,
    2.5,
    100.25,
    123456.789,
    1.5e9 + 0.25,
    9_999_999_999.5,
)
"""Values at the edges of :data:`ARROW_PLAIN_RANGE` and between (none whole) on which
:func:`_arrow_writes_repr` compares Arrow's text with ``repr``'s."""


@cache
def _arrow_writes_repr() -> bool:
    """Whether this Arrow's float-to-text cast gives ``repr``'s text within
    :data:`ARROW_PLAIN_RANGE` (checked once, on values at its edges and between)."""
    import pyarrow
    import pyarrow.compute as pc

    cast = pc.cast(pyarrow.array(ARROW_PROBE), pyarrow.string()).to_pylist()
    return cast == list(map(repr, ARROW_PROBE))


def _float_text(table: pd.DataFrame) -> pd.DataFrame:
    """``table`` with each float64 column replaced by the text pandas would write for it.

    pandas writes a float64 value as numpy's shortest round-trip text, the same as Python's
    ``repr`` (and "" for NaN); Python's ``repr`` makes it about twice as fast, which is most
    of the time of writing a table of daily flows. The file's bytes are the same (tested).
    """
    floats = [i for i, dtype in enumerate(table.dtypes) if dtype == np.float64]
    if not floats:
        return table
    table = table.copy(deep=False)
    for i in floats:
        table.isetitem(i, _column_text(table.iloc[:, i].to_numpy()))
    return table


def _column_text(values: np.ndarray) -> np.ndarray:
    """The text of a float64 column (see :func:`_float_text`); a column of one value (the same
    bits in every row, e.g. the bounds' ``level``) is turned into text once."""
    if _one_value(values):
        return np.full(len(values), _float_repr(values[0]), dtype=object)
    text = np.array(list(map(repr, values.tolist())), dtype=object)
    text[np.isnan(values)] = ""
    return text


def _one_value(values: np.ndarray) -> bool:
    """Whether a float64 column holds the same bits in every row (and at least one row)."""
    bits = values.view(np.int64)
    return bool(len(values)) and bool((bits == bits[0]).all())


def _float_repr(value: float) -> str:
    """The text pandas writes for one float64 value ("" for NaN)."""
    return "" if np.isnan(value) else repr(float(value))


def _fill_run_folder(staging, tables, layers, crs, figures, report, manifest) -> None:
    for name, table in tables.items():  # a table given as a call is built as it is written
        _write_table(staging / name, table)
    for name, layer in layers.items():
        _write_layer(staging / RESULTS_GPKG, name, layer, crs)
    figures = figures() if callable(figures) else figures
    pairs = figures.items() if isinstance(figures, Mapping) else figures
    written = FigureFiles(staging / "figures")
    for name, png in pairs:  # each image written as it comes, none kept
        written.path(name).parent.mkdir(exist_ok=True)
        written.path(name).write_bytes(png)
        written.names.append(name)
    report = report(written) if callable(report) else report
    if report is not None:
        with open(staging / "report.html", "w", encoding="utf-8") as stream:
            stream.writelines([report] if isinstance(report, str) else report)
    (staging / MANIFEST).write_bytes(_manifest_bytes(manifest))


def _write_table(path: Path, table: pd.DataFrame | TableParts | Callable) -> None:
    """One CSV table; a call is made here, so the table is held only while it is written."""
    table = table() if callable(table) else table
    with open(path, "w", newline="", encoding="utf-8") as stream:
        _table_to_csv(table, stream)


def _write_layer(path: Path, name: str, layer: gpd.GeoDataFrame | Callable, crs: object) -> None:
    """One layer of the results GeoPackage; a call is made here (held only while written)."""
    frame = layer() if callable(layer) else layer
    frame = frame if frame.crs is not None else frame.set_crs(crs)
    frame.to_file(path, layer=name, driver="GPKG", engine="pyogrio", dataset_options=GPKG_OPTIONS)


class FigureFiles(Mapping):
    """The PNG images written into a results folder, by name in the order written; each read
    from its file when asked for (so a report built from them holds one image at a time)."""

    def __init__(self, folder: Path) -> None:
        self.folder = folder
        self.names: list[str] = []

    def path(self, name: str) -> Path:
        return self.folder / f"{name}.png"

    def __getitem__(self, name: str) -> bytes:
        if name not in self.names:
            raise KeyError(name)
        return self.path(name).read_bytes()

    def __iter__(self) -> Iterator[str]:
        return iter(self.names)

    def __len__(self) -> int:
        return len(self.names)


def _manifest_bytes(manifest: Mapping[str, object]) -> bytes:
    """``run.json`` text: the ownership marker (``tool``, ``format``) first, then the rest."""
    content = {"tool": TOOL, "format": FORMAT} | {**manifest} | {"tool": TOOL, "format": FORMAT}
    return (json.dumps(content, indent=2, default=str) + "\n").encode("utf-8")


def _swap_into_place(staging: Path, target: Path) -> None:
    """Rename ``staging`` to ``target``, setting aside whatever results folder is there.

    Another writer may put its folder in place between two steps: then that one is set aside
    in turn, so the last writer's folder stays, whole. Only results folders of this tool (or
    empty folders) are ever set aside; folders set aside are removed at the end.
    """
    aside: list[Path] = []
    try:
        for _ in range(_SWAP_ATTEMPTS):
            with _signals_held():
                if _moved_into_place(staging, target, aside):
                    return
        _put_back(aside, target)
        raise OSError(errno.EBUSY, "other writers kept replacing the folder", str(target))
    finally:
        for place in aside:
            shutil.rmtree(place, ignore_errors=True)


def _moved_into_place(staging: Path, target: Path, aside: list[Path]) -> bool:
    """One try: set aside what is at ``target``, rename ``staging`` there. False when another
    writer took the name in between; any other failure puts the earlier folder back."""
    if target.exists() or target.is_symlink():
        _check_replaceable(target)
        aside.append(_temporary_folder(target, ".old"))
        try:
            os.rename(target, aside[-1])
        except FileNotFoundError:
            pass  # another writer set it aside first
    try:
        os.rename(staging, target)
    except OSError as error:
        if error.errno in (errno.ENOTEMPTY, errno.EEXIST):
            return False
        _put_back(aside, target)
        raise
    return True


def _put_back(aside: list[Path], target: Path) -> None:
    """Return the last results folder set aside to ``target`` when nothing took its place."""
    if target.exists() or target.is_symlink():
        return
    for place in reversed(aside):
        if is_results_folder(place):
            os.rename(place, target)
            aside.remove(place)
            return


def update_run_folder(
    folder: str | Path,
    *,
    tables: Mapping[str, pd.DataFrame | TableParts],
    layers: Mapping[str, gpd.GeoDataFrame],
    crs: object,
    figures: Mapping[str, bytes],
    report: str | None = None,
    manifest: Mapping[str, object] | None = None,
    files: Mapping[str, ExtraFile] | None = None,
) -> Path:
    """Add or replace some files of an earlier results folder of this tool, each atomically.

    Used by the commands that redo one stage (``predict``, ``screen``): the other files of an
    earlier full run stay as they are. Every file is written to a temporary name and renamed;
    ``results.gpkg`` is copied, its layers replaced in the copy, and the copy renamed; the
    manifest is written last. Modes follow the user's umask.

    Parameters
    ----------
    folder : str or Path
        An earlier results folder (its ``run.json`` written by this tool).
    tables, layers, crs, figures
        As for :func:`write_run_folder`.
    report : str, optional
        New text of ``report.html``.
    manifest : mapping, optional
        New ``run.json`` (``tool`` and ``format`` added).
    files : mapping, optional
        As for :func:`write_run_folder`; each sub-folder named is replaced as a whole (its
        other files removed once the new ones are in place).

    Returns
    -------
    Path
        The results folder.

    Raises
    ------
    InputError
        The folder is not an earlier results folder of this tool.
    RunError
        The system refused a write; files not yet replaced keep their earlier content.
    """
    target = Path(folder).expanduser().resolve()
    _check_parent(target, what="results")
    if not is_results_folder(target):
        raise InputError(
            f"no earlier results at {target}: a stage update needs the folder of a complete "
            f"run (with its {MANIFEST}). Fix: run 'regional run' with this output folder first."
        )
    remove_stale_temporaries(target)
    try:
        _update_files(target, tables, layers, crs, figures, report)
        _update_extra_files(target, files or {})
        if manifest is not None:
            content = json.dumps(
                {"tool": TOOL, "format": FORMAT, **manifest}, indent=2, default=str
            )
            _write_bytes_atomically(target / MANIFEST, (content + "\n").encode("utf-8"))
    except OSError as error:
        raise _write_failure(target, error) from error
    return target


def read_figures(folder: str | Path) -> dict[str, bytes]:
    """PNG bytes of ``figures/*.png`` of a results folder, by name (empty when none)."""
    place = Path(folder) / "figures"
    if not place.is_dir():
        return {}
    return {path.stem: path.read_bytes() for path in sorted(place.glob("*.png"))}


def _update_files(target, tables, layers, crs, figures, report) -> None:
    for name, table in tables.items():
        _write_atomically(target / name, lambda stream, t=table: _table_to_csv(t, stream))
    if figures:
        (target / "figures").mkdir(mode=_dir_mode(), exist_ok=True)
    for name, png in figures.items():
        _write_bytes_atomically(target / "figures" / f"{name}.png", png)
    if layers:
        _replace_layers(target / RESULTS_GPKG, layers, crs)
    if report is not None:
        _write_bytes_atomically(target / "report.html", report.encode("utf-8"))


ExtraFile = bytes | pd.DataFrame | TableParts | Callable[[], pd.DataFrame]
"""A further file of a results folder: bytes as they are, a DataFrame as Parquet (index
kept), :class:`TableParts` as Parquet a row group per part, or a call giving a DataFrame."""


def _write_file(folder: Path, name: str, content: ExtraFile) -> None:
    """Write one further file (:data:`ExtraFile`) into a new folder."""
    content = content() if callable(content) else content
    path = folder / name
    path.parent.mkdir(mode=_dir_mode(), exist_ok=True)
    if isinstance(content, pd.DataFrame | TableParts):
        with open(path, "wb") as stream:
            _write_parquet(content, stream)
        path.chmod(_file_mode())
    else:
        path.write_bytes(content)


def _write_parquet(content: pd.DataFrame | TableParts, stream) -> None:
    """A DataFrame as Parquet (index kept), or :class:`TableParts` a row group per part (the
    file's schema that of the first part)."""
    import pyarrow
    import pyarrow.parquet

    try:
        if isinstance(content, pd.DataFrame):
            content.to_parquet(stream)
            return
        writer = None
        try:
            for part in content.parts():
                table = pyarrow.Table.from_pandas(part)
                if writer is None:
                    writer = pyarrow.parquet.ParquetWriter(stream, table.schema)
                writer.write_table(table)
        finally:
            if writer is not None:
                writer.close()
    finally:
        # Arrow's pool (mimalloc) keeps freed pages for reuse; a large region's client
        # writes several tables in turn and should not hold them all
        pyarrow.default_memory_pool().release_unused()


def _update_extra_files(target: Path, files: Mapping[str, ExtraFile]) -> None:
    """Replace further files atomically; stale files of the sub-folders named are removed."""
    for name, content in files.items():
        path = target / name
        path.parent.mkdir(mode=_dir_mode(), exist_ok=True)
        content = content() if callable(content) else content
        if isinstance(content, pd.DataFrame | TableParts):
            _write_atomically(path, partial(_write_parquet, content), text=False)
        else:
            _write_bytes_atomically(path, content)
    folders = {(target / name).parent for name in files} - {target}
    kept = {target / name for name in files}
    for folder in folders:
        for stale in folder.iterdir():
            if stale.is_file() and stale not in kept and not stale.name.endswith(".tmp"):
                stale.unlink()


def read_folder_files(folder: str | Path, sub: str) -> dict[str, bytes | pd.DataFrame]:
    """The files of ``folder/sub`` by relative name: Parquet as DataFrames, others as bytes.

    Empty when the sub-folder is absent. Raises :class:`~regional.errors.InputError` when a
    Parquet file cannot be read.
    """
    place = Path(folder) / sub
    if not place.is_dir():
        return {}
    found: dict[str, bytes | pd.DataFrame] = {}
    for path in sorted(place.iterdir()):
        if not path.is_file() or path.name.endswith(".tmp"):
            continue
        name = f"{sub}/{path.name}"
        if path.suffix == ".parquet":
            try:
                found[name] = pd.read_parquet(path)
            except (OSError, ValueError) as error:
                raise InputError(f"cannot read {path} as Parquet ({error}).") from None
        else:
            found[name] = path.read_bytes()
    return found


def _write_atomically(path: Path, write, *, text: bool = True) -> None:
    """Call ``write(stream)`` on a temporary file beside ``path``, then rename it to ``path``."""
    temporary = None
    mode = "w" if text else "wb"
    options = {"newline": "", "encoding": "utf-8"} if text else {}
    try:
        with _signals_held():
            handle, temporary = tempfile.mkstemp(
                dir=path.parent, prefix=_temporary_prefix(path), suffix=".tmp"
            )
        with os.fdopen(handle, mode, **options) as stream:
            os.fchmod(stream.fileno(), _file_mode())
            write(stream)
        os.replace(temporary, path)
    except BaseException:
        if temporary is not None:
            Path(temporary).unlink(missing_ok=True)
        raise


def _write_bytes_atomically(path: Path, content: bytes) -> None:
    _write_atomically(path, lambda stream: stream.write(content), text=False)


def _replace_layers(gpkg: Path, layers: Mapping[str, gpd.GeoDataFrame], crs: object) -> None:
    staged = None
    try:
        with _signals_held():
            handle, temporary = tempfile.mkstemp(
                dir=gpkg.parent, prefix=_temporary_prefix(gpkg), suffix=".tmp.gpkg"
            )
            staged = Path(temporary)
        os.close(handle)
        if gpkg.exists():
            shutil.copyfile(gpkg, staged)
            staged.chmod(_file_mode())
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
        staged.chmod(_file_mode())
        os.replace(staged, gpkg)
    except BaseException:
        if staged is not None:
            staged.unlink(missing_ok=True)
        raise
