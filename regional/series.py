"""Daily series held once and compactly: the long series table streamed into (basin, day) grids.

The series file is read in batches of rows (:func:`regional.io.iter_series`). Each batch is
checked row by row (:func:`regional.checks.check_series` with ``whole=False``) and its values are
placed at once into one grid per variable, shaped (basins, days) in :data:`SERIES_DTYPE`, so a
basin's record is contiguous and no long-format frame outlives its batch. The checks that need
every row (basins without records, dates given twice, gaps in the forcing) then run on the
grids. When any check fails, the table is read again whole and checked by
:func:`~regional.checks.check_series`, so a bad file gets the same message, naming the file,
column, basin and row, as when it was read in one piece.

Memory: 4 bytes per basin-day and variable held (float32), plus one batch of rows while
reading and one byte per basin-day for the gap check (docs/scale.md).
"""

from __future__ import annotations

from abc import ABC, abstractmethod
from collections.abc import Iterator, Mapping, Sequence
from dataclasses import dataclass, replace
from functools import partial

import numpy as np
import pandas as pd

from regional import checks, io
from regional.config import Settings
from regional.errors import InputError

SERIES_DTYPE = np.float32
"""Storage type of the daily series. float32 keeps about 7 significant digits, far more than
rain gauges, PET formulas or flow ratings carry; the kernels and metrics compute in float64.
Leave-one-out scores of a region read as float32 and as float64 agree to 1e-5 relative
(tested)."""
BATCH_ROWS = 250_000
"""Rows of the series file read, checked and placed at a time (250,000 rather than 1,000,000:
the same time, and reading a 2,000-basin store peaked 170 MB lower)."""


@dataclass(frozen=True, eq=False)
class DailyGrids:
    """The daily series of every basin, as read.

    Attributes
    ----------
    start : Timestamp
        Date of the first day of the grids (the earliest record of any basin).
    values : dict
        Variable (``precip``, ``pet``, ``flow``, and ``temp`` when given) -> ndarray shaped
        (basins, days) of :data:`SERIES_DTYPE`, in the units of the file, NaN where no record
        or (flow) a missing value.
    first, last : Series
        First and last date of each basin's forcing records, indexed by ``basin_id``.
    """

    start: pd.Timestamp
    values: dict[str, np.ndarray]
    first: pd.Series
    last: pd.Series


class _WholeCheckNeeded(Exception):
    """A check that needs the whole table failed on the grids (the message comes from it)."""


def read_grids(settings: Settings, basin_ids: pd.Index) -> tuple[DailyGrids, str]:
    """Read and check the series file of a region into grids.

    Parameters
    ----------
    settings : Settings
        The ``[series]`` section names the file and its columns.
    basin_ids : Index
        Basin ids of the basins layer, in the order of the grids' rows.

    Returns
    -------
    (DailyGrids, str)
        The grids and the description of the file used in messages.

    Raises
    ------
    InputError
        As :func:`regional.checks.check_series` for the whole table.
    """
    spec = settings.series
    source = f"series {spec.path}" + (f" (table '{spec.layer}')" if spec.layer else "")
    try:
        start, days = _date_span(spec, source)
        return _fill(settings, basin_ids, source, start, days), source
    except (InputError, _WholeCheckNeeded) as error:
        _check_whole(settings, basin_ids, source)
        if isinstance(error, InputError):
            raise
        raise InputError(f"{source}: {error}") from None


def variables(settings: Settings) -> dict[str, str]:
    """Variable name -> column of the series file (temperature only when configured)."""
    spec = settings.series
    names = {"precip": spec.precip, "pet": spec.pet, "flow": spec.flow_column}
    if spec.temp:
        names["temp"] = spec.temp
    return names


def tables(
    grids: DailyGrids, dates: pd.DatetimeIndex, basin_ids: pd.Index
) -> dict[str, pd.DataFrame]:
    """The grids over ``dates`` as DataFrames (days, basins) that share the grids' memory.

    A period shorter than the grids is copied once (contiguous again) so the days outside it
    are freed.
    """
    first = (dates[0] - grids.start).days
    part = slice(first, first + len(dates))
    columns = pd.Index(basin_ids, name="basin_id")
    out = {}
    for name, grid in grids.values.items():
        values = grid[:, part]
        if values.shape[1] != grid.shape[1]:
            values = np.ascontiguousarray(values)
        out[name] = pd.DataFrame(values.T, index=dates, columns=columns, copy=False)
    return out


def _reading(spec, value_columns: Sequence[str]) -> Iterator[pd.DataFrame]:
    return io.iter_series(
        spec.path,
        id_column=spec.id,
        date_column=spec.date,
        value_columns=list(value_columns),
        layer=spec.layer,
        batch_rows=BATCH_ROWS,
    )


def _date_span(spec, source: str) -> tuple[pd.Timestamp, int]:
    """First pass over ids and dates only: the first date and the number of days spanned."""
    low, high = pd.NaT, pd.NaT
    for raw in _reading(spec, []):
        dates = checks.parse_dates(raw[spec.date], raw[spec.id], raw.index, source=source)
        if len(dates):
            low = dates.min() if pd.isna(low) else min(low, dates.min())
            high = dates.max() if pd.isna(high) else max(high, dates.max())
    if pd.isna(low):
        raise _WholeCheckNeeded("no records")
    return low, (high - low).days + 1


def _fill(
    settings: Settings, basin_ids: pd.Index, source: str, start: pd.Timestamp, days: int
) -> DailyGrids:
    spec = settings.series
    names = variables(settings)
    grids = {name: np.full((len(basin_ids), days), np.nan, SERIES_DTYPE) for name in names}
    forcing = [spec.precip, spec.pet] + ([spec.temp] if spec.temp else [])
    for raw in _reading(spec, [*forcing, spec.flow_column]):
        long = _checked(raw, settings, basin_ids, source, whole=False)
        _place(long, grids, names, basin_ids, start)
    first, last = _record_spans(grids["precip"], basin_ids, start)
    return DailyGrids(start=start, values=grids, first=first, last=last)


def _place(
    long: pd.DataFrame,
    grids: Mapping[str, np.ndarray],
    names: Mapping[str, str],
    basin_ids: pd.Index,
    start: pd.Timestamp,
) -> None:
    """Put one checked batch into the grids; a (basin, date) given twice needs the whole check."""
    row = basin_ids.get_indexer(long["basin_id"])
    day = (long["date"].to_numpy() - start.to_datetime64()) // np.timedelta64(1, "D")
    days = grids["precip"].shape[1]
    if pd.Index(row * days + day).has_duplicates or np.isfinite(grids["precip"][row, day]).any():
        raise _WholeCheckNeeded("a basin has two records of one date")
    for name, column in names.items():
        grids[name][row, day] = long[column].to_numpy()


def _record_spans(
    precip: np.ndarray, basin_ids: pd.Index, start: pd.Timestamp
) -> tuple[pd.Series, pd.Series]:
    """First and last record date per basin; a basin without records or with a gap fails.

    Forcing is finite on every record (checked row by row), so a finite precipitation marks a
    record.
    """
    present = np.isfinite(precip)
    count = present.sum(axis=1)
    first = present.argmax(axis=1)
    last = present.shape[1] - 1 - present[:, ::-1].argmax(axis=1)
    if (count == 0).any():
        raise _WholeCheckNeeded("a basin has no records")
    if (count < last - first + 1).any():
        raise _WholeCheckNeeded("a basin's forcing has a gap")
    index = pd.Index(basin_ids, name="basin_id")
    return (
        pd.Series(start + pd.to_timedelta(first, unit="D"), index=index),
        pd.Series(start + pd.to_timedelta(last, unit="D"), index=index),
    )


def _check_whole(settings: Settings, basin_ids: pd.Index, source: str) -> None:
    """Read the table in one piece and check it: raises the message of the first problem."""
    spec = settings.series
    forcing = [spec.precip, spec.pet] + ([spec.temp] if spec.temp else [])
    raw = io.read_series(
        spec.path,
        id_column=spec.id,
        date_column=spec.date,
        value_columns=[*forcing, spec.flow_column],
        layer=spec.layer,
    )
    _checked(raw, settings, basin_ids, source, whole=True)


def _checked(
    raw: pd.DataFrame, settings: Settings, basin_ids: pd.Index, source: str, *, whole: bool
) -> pd.DataFrame:
    spec = settings.series
    return checks.check_series(
        raw,
        source=source,
        id_column=spec.id,
        date_column=spec.date,
        forcing_columns=[spec.precip, spec.pet] + ([spec.temp] if spec.temp else []),
        flow_column=spec.flow_column,
        basin_ids=list(basin_ids),
        max_precip_mm_per_day=spec.max_precip_mm_per_day,
        whole=whole,
    )


# --------------------------------------------------------------------------------------------
# The series store: one row group per basin, read where it is computed
# --------------------------------------------------------------------------------------------


def write_store(settings: Settings, basin_ids: pd.Index, target) -> int:
    """Check a region's series file and write it as a series store (one row group per basin).

    The store keeps the columns and units of ``[series]`` (so only its ``path`` changes in
    ``region.toml``), each basin's records in date order, values as :data:`SERIES_DTYPE`: a
    region read from the store holds the very values it held when read from the source file.

    Returns
    -------
    int
        Rows written.
    """
    grids, _ = read_grids(settings, basin_ids)
    spec = settings.series
    dates = pd.date_range(grids.start, periods=grids.values["precip"].shape[1], freq="D")
    names = variables(settings)
    written = 0

    def tables() -> Iterator[pd.DataFrame]:
        nonlocal written
        for row, basin in enumerate(basin_ids):
            present = np.isfinite(grids.values["precip"][row])
            columns = {spec.id: np.full(int(present.sum()), str(basin), dtype=object)}
            columns[spec.date] = dates[present]
            for name, column in names.items():
                columns[column] = grids.values[name][row, present]
            written += int(present.sum())
            yield pd.DataFrame(columns)

    io.write_series_store(target, tables(), basins=[str(b) for b in basin_ids])
    return written


@dataclass(frozen=True, eq=False)
class StoreChunk:
    """Daily tables of some basins read from a series store.

    Attributes
    ----------
    tables : dict
        ``precip_mm``, ``pet_mm``, ``flow_mm`` (and ``temp_c`` when the reader has it) ->
        DataFrame (dates, basins) of :data:`SERIES_DTYPE`.
    rows_read : int
        Rows read from the file: the records of these basins only.
    """

    tables: dict[str, pd.DataFrame]
    rows_read: int


@dataclass(frozen=True, eq=False)
class StoreReader:
    """What a worker needs to read some basins' daily tables from a series store (small).

    Attributes
    ----------
    path : str
        The store, as the workers see it (a shared file system or the same machine).
    basins : tuple of str
        Basin ids in row-group order (from the file metadata).
    columns : dict
        ``precip_mm``, ``pet_mm``, ``flow_mm`` (``temp_c``) -> column of the store.
    date_column : str
        The date column.
    dates : DatetimeIndex
        Days of the tables returned (a part of the region's common period).
    mm_per_m3s : Series or None
        Per basin, mm/day per m3/s (86.4 / area_km2) when the store holds flow in m3/s.
    """

    path: str
    basins: tuple[str, ...]
    columns: dict[str, str]
    date_column: str
    dates: pd.DatetimeIndex
    mm_per_m3s: pd.Series | None = None

    def read(self, basins: Sequence[str]) -> StoreChunk:
        """Read the row groups of ``basins`` only and place them on :attr:`dates`."""
        grids, rows = self.read_grids(basins)
        return StoreChunk(tables=self.frames(grids, basins), rows_read=rows)

    def read_grids(self, basins: Sequence[str]) -> tuple[dict[str, np.ndarray], int]:
        """Each table's values as read (basins x :attr:`dates`, NaN where a basin has no
        record; flow in the store's unit), and the rows read from the file."""
        where = {basin: group for group, basin in enumerate(self.basins)}
        groups = [where[str(basin)] for basin in basins]
        wanted = [self.date_column, *self.columns.values()]
        frame, counts = io.read_store_groups(self.path, groups, wanted)
        grids = {
            name: np.full((len(basins), len(self.dates)), np.nan, SERIES_DTYPE)
            for name in self.columns
        }
        day = self.dates.get_indexer(pd.DatetimeIndex(frame[self.date_column]))
        column = np.repeat(np.arange(len(basins)), counts)
        inside = day >= 0
        place = (column[inside], day[inside])
        for name, source in self.columns.items():
            grids[name][place] = frame[source].to_numpy()[inside]
        return grids, len(frame)

    def frames(self, grids: dict[str, np.ndarray], basins: Sequence[str]) -> dict:
        """The tables of :meth:`read` from grids of :meth:`read_grids` (C-ordered, basins
        x dates): DataFrames (dates, basins), flow in mm/day."""
        ids = pd.Index([str(b) for b in basins], name="basin_id")
        out = {
            name: pd.DataFrame(grid.T, index=self.dates, columns=ids, copy=False)
            for name, grid in grids.items()
        }
        if self.mm_per_m3s is not None and "flow_mm" in out:
            factor = self.mm_per_m3s.reindex(ids).to_numpy().astype(SERIES_DTYPE)
            out["flow_mm"] = out["flow_mm"] * factor
        return out


def store_reader(
    settings: Settings,
    dates: pd.DatetimeIndex,
    *,
    with_temp: bool,
    area_km2: pd.Series | None = None,
) -> StoreReader | None:
    """A reader of the region's series file when it is a series store, else None."""
    spec = settings.series
    basins = io.series_store_basins(spec.path)
    if basins is None:
        return None
    columns = {"precip_mm": spec.precip, "pet_mm": spec.pet, "flow_mm": spec.flow_column}
    if with_temp:
        columns["temp_c"] = spec.temp
    factor = None
    if spec.flow_m3s is not None:
        factor = 86.4 / area_km2.astype(float)
    return StoreReader(
        path=str(spec.path),
        basins=basins,
        columns=columns,
        date_column=spec.date,
        dates=dates,
        mm_per_m3s=factor,
    )


def shipped(function, context, reader: StoreReader | None):
    """The task and context to hand an executor: with a reader, the context travels without
    its daily tables and each task reads its own basins' tables from the store."""
    if reader is None:
        return function, context
    empty = {name: None for name in ("precip_mm", "pet_mm", "flow_mm", "temp_c")}
    return partial(_from_store, function), _Shipped(replace(context, **empty), reader)


@dataclass(frozen=True, eq=False)
class _Shipped:
    """A context without its daily tables and the reader of its tasks' tables (one object, so
    an executor scatters it whole)."""

    context: object
    reader: StoreReader


def _from_store(function, chunk: Sequence[str], shipped_context: _Shipped):
    tables = shipped_context.reader.read(chunk).tables
    return function(chunk, replace(shipped_context.context, **tables))


# --------------------------------------------------------------------------------------------
# A region whose series stay in the store (a run on a cluster): checked a block at a time
# --------------------------------------------------------------------------------------------

STORE_BLOCK = 64
"""Basins of a series store read at a time by the client of a cluster run for the summaries of
loading (the attributes of the series, the flow checks): a block's four tables over 20 years
are about 7.5 MB as float32. The store is checked :data:`BATCH_ROWS` rows (whole row groups)
at a time, as a streamed file is."""


def check_store(settings: Settings, basin_ids: pd.Index) -> tuple[pd.Series, pd.Series, str]:
    """Check a series store a block of basins at a time, without holding its grids.

    The rows are checked as :func:`read_grids` checks them, and so are the checks that need
    the whole table (basins without records, a date given twice, gaps in the forcing), per
    basin; when one fails the file is read whole and checked, so the message is the one it
    gets when read by :func:`read_grids`.

    Returns
    -------
    (Series, Series, str)
        First and last record date of each basin (indexed by ``basin_id``), and the
        description of the file used in messages.

    Raises
    ------
    InputError
        As :func:`read_grids`; and when a row group of the store holds another basin's rows
        than the store lists for it.
    """
    spec = settings.series
    source = f"series {spec.path}" + (f" (table '{spec.layer}')" if spec.layer else "")
    try:
        first, last = _store_spans(settings, basin_ids, source)
    except (InputError, _WholeCheckNeeded) as error:
        _check_whole(settings, basin_ids, source)
        if isinstance(error, InputError):
            raise
        raise InputError(f"{source}: {error}") from None
    return first, last, source


def _store_spans(
    settings: Settings, basin_ids: pd.Index, source: str
) -> tuple[pd.Series, pd.Series]:
    spec = settings.series
    listed = io.series_store_basins(spec.path)
    forcing = [spec.precip, spec.pet] + ([spec.temp] if spec.temp else [])
    columns = [spec.id, spec.date, *forcing, spec.flow_column]
    n = len(basin_ids)
    first, last = np.full(n, np.iinfo(np.int64).max), np.full(n, np.iinfo(np.int64).min)
    count = np.zeros(n, dtype=np.int64)
    for groups, starts, raw in io.iter_store_blocks(spec.path, columns, batch_rows=BATCH_ROWS):
        long = _checked(raw, settings, basin_ids, source, whole=False)
        _check_groups(long, groups, starts, listed, source)
        row = basin_ids.get_indexer(long["basin_id"])
        day = (long["date"].to_numpy() - np.datetime64(0, "D")) // np.timedelta64(1, "D")
        if pd.MultiIndex.from_arrays([row, day]).has_duplicates:
            raise _WholeCheckNeeded("a basin has two records of one date")
        spans = pd.Series(day).groupby(row).agg(["min", "max", "size"])
        at = spans.index.to_numpy()
        first[at], last[at] = spans["min"].to_numpy(), spans["max"].to_numpy()
        count[at] += spans["size"].to_numpy()
    if (count == 0).any():
        raise _WholeCheckNeeded("a basin has no records")
    if (count < last - first + 1).any():
        raise _WholeCheckNeeded("a basin's forcing has a gap")
    index = pd.Index(basin_ids, name="basin_id")
    epoch = pd.Timestamp(0)
    return (
        pd.Series(epoch + pd.to_timedelta(first, unit="D"), index=index),
        pd.Series(epoch + pd.to_timedelta(last, unit="D"), index=index),
    )


def _check_groups(
    long: pd.DataFrame, groups: range, starts: np.ndarray, listed: Sequence[str], source: str
) -> None:
    """Every row of a store's row group is a record of the basin the store lists for it (the
    workers place a group's rows by that list)."""
    group = groups.start + np.searchsorted(starts, long.index.to_numpy(), side="right") - 1
    expected = np.asarray(listed, dtype=object)[group]
    wrong = np.flatnonzero(long["basin_id"].to_numpy(dtype=object) != expected)
    if len(wrong):
        at = wrong[0]
        raise InputError(
            f"{source}: {long.index.name} {long.index[at]}: row group {group[at]} of the "
            f"series store holds a record of basin '{long['basin_id'].iloc[at]}', but the "
            f"store lists basin '{expected[at]}' for it. Fix: write the store again with "
            "`regional convert`."
        )


class LazyTable(ABC):
    """The DataFrame-like answers of a daily table (days x basins) whose values are read only
    when asked for: :attr:`shape`, ``len``, ``loc`` / ``iloc`` (:class:`DaysView`),
    ``table[basins]`` and ``reindex(columns=basins)``. A subclass gives ``index`` (days),
    ``columns`` (basins), :meth:`over` and :meth:`read`."""

    index: pd.DatetimeIndex
    columns: pd.Index

    @property
    def shape(self) -> tuple[int, int]:
        return len(self.index), len(self.columns)

    def __len__(self) -> int:
        return len(self.index)

    @property
    def loc(self) -> DaysView:
        return DaysView(self, by_label=True)

    @property
    def iloc(self) -> DaysView:
        return DaysView(self, by_label=False)

    def __getitem__(self, basins):
        if isinstance(basins, str):
            return self.read([basins])[basins]
        return self.read(list(basins))

    def reindex(self, columns) -> pd.DataFrame:
        return self.read(list(columns))

    @abstractmethod
    def over(self, positions: np.ndarray) -> LazyTable:
        """The table over some of its days (positions in ``index``); reads nothing."""

    @abstractmethod
    def read(self, basins: Sequence[str]) -> pd.DataFrame:
        """The values of ``basins`` (DataFrame days x basins)."""


@dataclass(frozen=True, eq=False)
class StoreTable(LazyTable):
    """One daily table of a region (days x basins) whose values stay in the series store.

    It answers like the region's DataFrame where the client of a cluster run uses it:
    :attr:`index` (its days) and :attr:`columns` (its basins) read nothing, nor does
    ``loc``/``iloc`` with days only (the table over those days); values are read when asked
    for, those of the basins asked only: ``table[basins]``, ``table.loc[days, basins]`` and
    ``table.reindex(columns=basins)`` return a DataFrame (days, basins) of
    :data:`SERIES_DTYPE`, flow in mm/day.

    Attributes
    ----------
    reader : StoreReader
        Reads this table's one column over its days.
    columns : Index
        The basins (``basin_id``).
    """

    reader: StoreReader
    columns: pd.Index

    @property
    def index(self) -> pd.DatetimeIndex:
        return self.reader.dates

    def over(self, positions: np.ndarray) -> StoreTable:
        """The table over some of its days (positions in :attr:`index`); reads nothing."""
        positions = np.asarray(positions, dtype=int)
        run = len(positions) and (np.diff(positions) == 1).all()
        where = slice(positions[0], positions[-1] + 1) if run else positions  # a run keeps freq
        return replace(self, reader=replace(self.reader, dates=self.index[where]))

    def read(self, basins: Sequence[str]) -> pd.DataFrame:
        """The values of ``basins`` (DataFrame days x basins), read from their row groups
        :data:`STORE_BLOCK` basins at a time (the rows as read, with their dates, take about
        five times the values placed)."""
        (name,) = self.reader.columns
        basins = [str(b) for b in basins]
        grid = np.empty((len(basins), len(self.index)), SERIES_DTYPE)
        for first in range(0, len(basins), STORE_BLOCK):
            part, _ = self.reader.read_grids(basins[first : first + STORE_BLOCK])
            grid[first : first + STORE_BLOCK] = part[name]
            del part
            io.release_arrow_memory()
        return self.reader.frames({name: grid}, basins)[name]


class DaysView:
    """``.loc`` / ``.iloc`` of a table whose values are read when asked for (a
    :class:`StoreTable`, a :class:`regional.kept.KeptTable`): days select a table (its
    ``over``), days and basins read values (its ``read``; one basin gives a Series)."""

    def __init__(self, table: StoreTable, *, by_label: bool) -> None:
        self.table, self.by_label = table, by_label

    def __getitem__(self, key):
        days, basins = key if isinstance(key, tuple) else (key, None)
        place = pd.Series(np.arange(len(self.table.index)), index=self.table.index)
        picked = place.loc[days] if self.by_label else place.iloc[days]
        table = self.table.over(np.atleast_1d(np.asarray(picked)))
        if basins is None:
            return table
        if isinstance(basins, str):
            return table.read([basins])[basins]
        if isinstance(basins, slice) and basins == slice(None):
            basins = table.columns
        return table.read(list(basins))


def store_tables(reader: StoreReader, basin_ids: pd.Index) -> dict[str, StoreTable]:
    """The reader's tables (``precip_mm``, ``pet_mm``, ``flow_mm``, ``temp_c``) left in the
    store, one :class:`StoreTable` each."""
    columns = pd.Index([str(b) for b in basin_ids], name="basin_id")
    return {
        name: StoreTable(replace(reader, columns={name: column}), columns)
        for name, column in reader.columns.items()
    }


def store_blocks(reader: StoreReader, basin_ids: Sequence[str], *, block: int | None = None):
    """The reader's tables of ``block`` basins at a time (default :data:`STORE_BLOCK`):
    (basins, tables) pairs."""
    ids = [str(b) for b in basin_ids]
    block = block or STORE_BLOCK
    for first in range(0, len(ids), block):
        basins = ids[first : first + block]
        yield basins, reader.read(basins).tables
        io.release_arrow_memory()


def basins_of(table, basins: Sequence[str]):
    """Some basins' columns of a daily table: a DataFrame's columns, or a :class:`StoreTable`
    of those basins (nothing read: on a cluster the tasks read their own)."""
    if isinstance(table, StoreTable):
        return replace(table, columns=pd.Index([str(b) for b in basins], name="basin_id"))
    return table[list(basins)]
