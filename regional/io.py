"""Readers and writers: the only module that touches files.

Readers return plain objects (GeoDataFrames, DataFrames, :class:`Raster`, :class:`Overlay`) and
raise :class:`regional.errors.InputError` naming the file, layer or column at fault.
"""

from __future__ import annotations

from dataclasses import dataclass

import geopandas as gpd
import numpy as np


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
